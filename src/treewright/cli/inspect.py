"""treewright inspect: a grammar's symbols in the terminal, or one symbol in full."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright inspect runs/harbour
  treewright inspect harbour.pcfg --corpus dev.txt --top 5 --threshold 0.05
  treewright inspect harbour.pcfg --symbol N3 --corpus dev.txt --examples 20
  treewright inspect runs/lexicalized_demo --pairs 20

Without --symbol: per symbol its entropy (bits), its most probable rules (preterminals: words)
above --threshold, at most --top of them, and with --corpus its expected count there.
With --symbol: every rule of that symbol, and with --corpus the spans where it is most
probable (one-word spans: the posterior of the symbol over the word; wider spans: where the
Viterbi trees use it, with the posterior that the span is a constituent).
For the run folder of a lexicalized model (model.parameterization: lexicalized), the listing
is its symbol-only back-off grammar, followed by what the model learned about words: each
nonterminal's back-off weight, and the --pairs strongest head-dependent word pairs and
head-symbol pairs, each with its score (the model is read back from the run's checkpoint and
its training corpus, which must still be where its config points).
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar", help="grammar file (text or JSON export) or training run folder")
    p.add_argument("--corpus", help="the sentences for usage and examples: raw text, one per "
                                    "line, or the words of each tree or CoNLL-U block")
    p.add_argument("--symbol", help="show this symbol in full (a name after --rename)")
    p.add_argument("--threshold", type=float, default=None,
                   help="show rules with at least this probability (default 0.01)")
    p.add_argument("--top", type=int, default=None,
                   help="at most this many rules per symbol (default 10; 0: no cap)")
    p.add_argument("--examples", type=int, default=10, help="--symbol: example spans to show")
    p.add_argument("--rename", metavar="FILE", help="symbol renaming file ('OLD NEW' per line)")
    p.add_argument("--pairs", type=int, default=10,
                   help="a lexicalized run: the strongest word pairs and head-symbol pairs "
                        "shown (default 10)")


def run(args) -> int:
    from treewright.cli.common import as_trained, read_sentences
    from treewright.errors import InputError
    from treewright.export import load_renaming, open_grammar, rename_grammar
    from treewright.export.lexical import format_lexical_summary
    from treewright.induce import lexical_summary_of
    from treewright.export.listing import (DEFAULT_THRESHOLD, DEFAULT_TOP, expected_counts,
                                           format_listing, format_symbol, summarize,
                                           symbol_examples)

    if args.pairs < 1:
        raise InputError(f"--pairs wants a positive count, not {args.pairs}")
    source = open_grammar(args.grammar)
    grammar = source.grammar
    mapping = load_renaming(args.rename, grammar) if args.rename else {}
    named = rename_grammar(grammar, mapping)
    lines = read_sentences(args.corpus) if args.corpus else None
    sentences = as_trained(source, lines) if lines else None
    counts = expected_counts(named, sentences) if sentences else None
    if args.symbol is None:
        threshold = DEFAULT_THRESHOLD if args.threshold is None else args.threshold
        top = DEFAULT_TOP if args.top is None else (args.top or None)
        note = None if counts is None else (
            f"expected counts over {counts.sentences} sentences of {args.corpus} "
            f"({counts.unparsed} without a parse)")
        print(format_listing(named, summarize(named, counts, threshold, top), threshold, top,
                             note), end="")
        lexical = lexical_summary_of(args.grammar, args.pairs, mapping)
        if lexical is not None:
            print()
            print(format_lexical_summary(lexical), end="")
        return 0
    known = named.symbols + ([] if named.root_is_symbol else [named.start])
    if args.symbol not in known:
        raise InputError(f"the grammar has no symbol {args.symbol} (it has "
                         f"{', '.join(known)})", path=args.grammar)
    summary = next(s for s in summarize(named, counts, 0.0, None) if s.name == args.symbol)
    print("\n".join(format_symbol(summary)))
    if sentences and args.symbol in named.symbols:
        examples = symbol_examples(named, sentences, args.symbol, args.examples)
        print(f"\nexample spans from {args.corpus} (highest posterior first):")
        for e in examples:
            mark = "viterbi" if e.in_viterbi else "       "
            print(f"  {e.posterior:.4f}  {mark}  line {lines[e.sentence][0]} "
                  f"[{e.start}:{e.end}]  {' '.join(lines[e.sentence][1][e.start:e.end])}")
        if not examples:
            print("  (none: the symbol is used nowhere in this corpus)")
    return 0
