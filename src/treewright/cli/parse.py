"""treewright parse: the most probable tree of each sentence."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright parse examples/astronomers.pcfg sentences.txt
  echo "astronomers saw stars with ears" | treewright parse examples/astronomers.pcfg - --scores

One bracketed tree per input line. A sentence with no parse prints '(NOPARSE w1 w2 ...)' so the
output keeps one line per sentence, and the reason goes to standard error.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar", help="grammar file (the treewright grammar text format)")
    p.add_argument("text", help="raw text, one sentence per line ('-': stdin)")
    p.add_argument("--scores", action="store_true",
                   help="append a tab and the tree's log-probability to each line")


def run(args) -> int:
    import sys

    from treewright.cli.common import read_sentences
    from treewright.grammar import load_grammar
    from treewright.inference import viterbi_parse

    grammar = load_grammar(args.grammar)
    lines = read_sentences(args.text)
    unparsed = 0
    for (line, words), (tree, logp) in zip(lines, viterbi_parse(grammar, [w for _, w in lines])):
        if tree is None:
            unparsed += 1
            unknown = [w for w in words if w not in grammar.vocab]
            why = f"unknown words {unknown}" if unknown else "no tree covers it"
            where = "<stdin>" if args.text == "-" else args.text
            print(f"{where}, line {line}: no parse ({why})", file=sys.stderr)
            text = "(NOPARSE " + " ".join(words) + ")"
        else:
            text = tree.to_string()
        print(f"{text}\t{logp!r}" if args.scores else text)
    if unparsed:
        print(f"{unparsed} of {len(lines)} sentences had no parse", file=sys.stderr)
    return 0
