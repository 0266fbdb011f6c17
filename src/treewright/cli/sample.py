"""treewright sample: sentences with their trees, drawn from a grammar."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright sample src/treewright/data/examples/astronomers.pcfg -n 5 --seed 1
  treewright sample grammar.pcfg -n 1000 --words-only > synthetic.txt
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar", help="grammar: a grammar text file, a JSON export or a run folder")
    p.add_argument("-n", type=int, default=10, help="number of sentences (default 10)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--max-words", type=int, default=60,
                   help="redraw sentences longer than this (default 60)")
    p.add_argument("--words-only", action="store_true", help="print sentences without trees")


def run(args) -> int:
    from treewright.decode import is_treebank_grammar, treebank_tree
    from treewright.export import load as load_grammar  # text, JSON export or run folder
    from treewright.inference import generate

    grammar = load_grammar(args.grammar)
    treebank = is_treebank_grammar([grammar])  # a treebank grammar's trees in its form, as parse
    for tree in generate(grammar, args.n, args.seed, args.max_words):
        print(" ".join(tree.leaves()) if args.words_only else
              " ".join(tree.leaves()) + "\t" + treebank_tree(tree, treebank).to_string())
    return 0
