"""treewright report: one self-contained HTML page about a train, refine or segment run."""

from __future__ import annotations

import argparse

from treewright.cli.common import add_budget_argument

EXAMPLES = """examples:
  treewright report runs/em_demo
  treewright report runs/em_demo --gold src/treewright/data/demo/dev.trees --out em_demo.html
  treewright report runs/em_demo --text src/treewright/data/demo/test.txt --heatmap-sentence 3

The page (default RUN/report.html) holds the likelihood, perplexity and dev F1 curves, F1 by
sentence length beside the baselines, label recall, each symbol's most probable rules and words,
example trees (predicted beside gold) and a span-posterior heat map. Figures are inline SVG: the
page needs no network and runs no script. What the run folder lacks is named on the page.
Without --gold the run's dev corpus is used when it has trees. A sentence too long for
--memory-budget is not parsed; the page names it. On a terminal a progress bar runs on standard
error while the sentences are parsed. For a lexicalized run (model.parameterization:
lexicalized) the page adds what the model learned about words: each nonterminal's back-off
weight and the strongest head-dependent word pairs and head-symbol pairs (as `inspect` lists
them; the model is read back from the checkpoint and the training corpus).

For a segmentation run (treewright segment) the page holds the scores of its segmentation
against the gold beside the no-split and split-every-character baselines, the log joint
probability of every chain by sweep, the reported chain's F1, acceptance rate and cached units
by sweep, the induced lexicon (the most used units with customers and tables) and example
segmentations beside the gold.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    from treewright.cli.parse import DECODER_NAMES

    p.add_argument("run", help="run folder (config.yaml, metrics.jsonl, grammar.pcfg)")
    p.add_argument("--gold", help="gold trees (bracketed or CoNLL-U) to parse and score")
    p.add_argument("--gold-format", choices=("auto", "brackets", "conllu"), default="auto")
    p.add_argument("--text", help="sentences for examples and the heat map (without --gold): "
                                  "raw text, or bracketed trees or CoNLL-U read for their words")
    p.add_argument("--grammar", help="grammar: text file, JSON export or run folder (default: RUN/grammar.pcfg)")
    # The lexicalized decoder is parse's only: the report decodes with grammars.
    p.add_argument("--decoder", choices=[d for d in DECODER_NAMES if d != "lexicalized"],
                   default=None,
                   help="how trees are chosen (default: max-rule-product for a refined grammar, "
                        "consensus for a run that saved two or more restarts, else mbr; "
                        "consensus: every restart the run saved, see parse --help)")
    p.add_argument("--examples", type=int, default=3, help="example sentences drawn (default 3)")
    p.add_argument("--max-example-words", type=int, default=20,
                   help="longest example sentence drawn (default 20)")
    p.add_argument("--heatmap-sentence", type=int, default=1,
                   help="1-based sentence of the heat map (default 1)")
    p.add_argument("--max-sentences", type=int,
                   help="parse only the first N gold/text sentences (the page says so)")
    p.add_argument("--out", help="output file (default RUN/report.html)")
    add_budget_argument(p)


def run(args) -> int:
    from treewright.errors import InputError
    from treewright.induce import lexical_summary_of
    from treewright.report.html import write_report
    from treewright.report.segmentation import write_segment_report
    from treewright.run_configs import is_segment_run

    if is_segment_run(args.run):
        given = [f"--{name.replace('_', '-')}" for name in ("gold", "text", "grammar", "decoder")
                 if getattr(args, name) is not None]
        if given:
            raise InputError(f"{', '.join(given)}: for training runs; a segmentation run is "
                             "scored against the gold its config names", path=args.run)
        print(write_segment_report(args.run, args.out))
        return 0
    try:
        lexical = lexical_summary_of(args.run)
    except InputError as err:  # the page still opens, and says what is missing
        lexical = f"The lexicalized model could not be read back: {err}"
    path = write_report(args.run, args.out, gold=args.gold, text=args.text,
                        grammar_path=args.grammar, decoder=args.decoder,
                        examples=args.examples, max_example_words=args.max_example_words,
                        heatmap_sentence=args.heatmap_sentence, gold_format=args.gold_format,
                        max_sentences=args.max_sentences,
                        memory_budget_mb=args.memory_budget, lexical=lexical)
    print(path)
    return 0
