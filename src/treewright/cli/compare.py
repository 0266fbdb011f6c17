"""treewright compare: two grammars on the same text."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright compare runs/harbour-seed1 runs/harbour-seed2 --on dev.txt
  treewright compare a.pcfg b.json --on dev.txt --json

Reports each grammar's held-out log-likelihood on the text, how often their Viterbi trees agree
on brackets (F1 of one against the other, whole-sentence and one-word spans left out), and the
best one-to-one matching of their symbols by span overlap (an assignment problem). A run
folder or JSON export whose training lowercased its words reads the text lowercased too.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar_a", help="grammar file (text or JSON export) or run folder")
    p.add_argument("grammar_b", help="grammar file (text or JSON export) or run folder")
    p.add_argument("--on", required=True, metavar="TEXT",
                   help="raw text, one sentence per line ('-': stdin); or bracketed trees or "
                        "CoNLL-U, one sentence per tree or block")
    p.add_argument("--json", action="store_true", help="print the comparison as one JSON object")


def run(args) -> int:
    from treewright.cli.common import as_trained, dumps, read_sentences, trained_on_tags
    from treewright.export import compare, open_grammar

    source_a, source_b = open_grammar(args.grammar_a), open_grammar(args.grammar_b)
    # A bracketed or CoNLL-U file gives its tags when both grammars were trained on tags.
    lines = read_sentences(args.on, trained_on_tags(source_a) and trained_on_tags(source_b))
    # Each grammar reads the text as its own training run did (a run folder or JSON export
    # records whether its words were lowercased); lowercasing keeps the tokens one for one.
    result = compare(source_a.grammar, source_b.grammar, as_trained(source_a, lines),
                     as_trained(source_b, lines))
    if args.json:
        print(dumps(result.to_dict()))
    else:
        print(result.format(args.grammar_a, args.grammar_b))
    return 0
