"""treewright compare: two grammars on the same text."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright compare runs/harbour-seed1 runs/harbour-seed2 --on dev.txt
  treewright compare a.pcfg b.json --on dev.txt --json

Reports each grammar's held-out log-likelihood on the text, how often their Viterbi trees agree
on brackets (F1 of one against the other, whole-sentence and one-word spans left out), and the
best one-to-one matching of their symbols by span overlap (an assignment problem).
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar_a", help="grammar file (text or JSON export) or run folder")
    p.add_argument("grammar_b", help="grammar file (text or JSON export) or run folder")
    p.add_argument("--on", required=True, metavar="TEXT",
                   help="raw text, one sentence per line ('-': stdin)")
    p.add_argument("--json", action="store_true", help="print the comparison as one JSON object")


def run(args) -> int:
    from treewright.cli.common import dumps, read_sentences
    from treewright.export import compare, load

    grammar_a, grammar_b = load(args.grammar_a), load(args.grammar_b)
    sentences = [w for _, w in read_sentences(args.on)]
    result = compare(grammar_a, grammar_b, sentences)
    if args.json:
        print(dumps(result.to_dict()))
    else:
        print(result.format(args.grammar_a, args.grammar_b))
    return 0
