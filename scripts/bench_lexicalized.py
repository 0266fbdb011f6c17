"""Benchmark: the speed of one training epoch of the lexicalized model (the neural bilexicalized
PCFG of Yang, Zhao & Tu 2021) on the invented head-final language, through the real trainer.

    .venv/bin/python scripts/bench_lexicalized.py                      # 500 of 5,000 sentences
    .venv/bin/python scripts/bench_lexicalized.py --measure 5000       # the whole epoch

The corpus is `--sentences` sentences of at most `--max-words` words drawn from the head-final
language (the demo's generating grammar, as `scripts/make_headed_language.py` and the induction
benchmark draw it, seeded). One epoch of `treewright train` with `--config` (default
configs/lexicalized_demo.yaml: 10 nonterminals, 20 preterminals, 16 head classes, gradient
training, batches of 16) runs over `--measure` of them, drawn at random from the corpus so that
their lengths are distributed as the corpus's. The trainer's own `sentences_per_second` of the
epoch (training steps only: no dev set, no checkpoint) is reported; when `--measure` is smaller
than `--sentences`, seconds per epoch of the whole corpus are extrapolated from it, linearly in
the sentence count, and the output says so. Pass `--threads 1` on a shared machine (the
default). Prints measured figures only; asserts nothing.
"""

from __future__ import annotations

import argparse
import datetime
import json
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path

import torch

from treewright.allocator import tune_allocator
from treewright.demo import demo_data_dir
from treewright.grammar import load_grammar
from treewright.induce import fit
from treewright.inference import generate
from treewright.train import load_train_config

REPO = Path(__file__).resolve().parents[1]


def draw_corpus(sentences: int, max_words: int, seed: int) -> list[list[str]]:
    """Head-final sentences: the demo's generating grammar, drawn as the benchmarks draw it."""
    grammar = load_grammar(demo_data_dir() / "grammar.pcfg")
    return [t.leaves() for t in generate(grammar, sentences, seed=seed, max_words=max_words)]


def main(argv: list[str] | None = None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter,
                                epilog="\n".join(__doc__.splitlines()[2:5]))
    p.add_argument("--sentences", type=int, default=5000, help="corpus size (default 5000)")
    p.add_argument("--max-words", type=int, default=20, help="longest sentence (default 20)")
    p.add_argument("--measure", type=int, default=500, help="sentences trained for one epoch "
                   "(default 500; --sentences: no extrapolation)")
    p.add_argument("--config", type=Path, default=REPO / "configs" / "lexicalized_demo.yaml")
    p.add_argument("--override", action="append", default=[],
                   help="extra dotted config override (repeatable)")
    p.add_argument("--seed", type=int, default=0, help="seed of the corpus and of the sample")
    p.add_argument("--threads", type=int, default=1, help="torch threads (shared machine: 1)")
    args = p.parse_args(argv)
    if not 0 < args.measure <= args.sentences:
        p.error("--measure must be between 1 and --sentences")
    tune_allocator()
    torch.set_num_threads(args.threads)

    corpus = draw_corpus(args.sentences, args.max_words, args.seed)
    sample = random.Random(args.seed).sample(corpus, args.measure)
    lengths = [len(s) for s in corpus]
    sample_lengths = [len(s) for s in sample]
    with tempfile.TemporaryDirectory(prefix="bench-lexicalized-") as folder:
        run_dir = Path(folder) / "run"
        cfg = load_train_config(args.config, [
            "data.dev=null", "train.epochs=1", "train.restarts=1", f"train.seed={args.seed}",
            f"data.max_length={args.max_words}", f"output.run_dir={run_dir}",
            "output.progress=false", "output.stdout_metrics=false", "output.tensorboard=false",
            *args.override])
        started = time.monotonic()
        with open(Path(folder) / "train.log", "w", encoding="utf-8") as log:
            fit(sample, cfg, run_dir=run_dir, stream=log)
        wall = time.monotonic() - started
        rows = [json.loads(x) for x in (run_dir / "metrics.jsonl").read_text().splitlines()]
    per_second = next(r["sentences_per_second"] for r in rows if "sentences_per_second" in r)
    epoch_seconds = args.measure / per_second
    whole = args.sentences / per_second
    m = cfg.model
    print(f"date {datetime.date.today().isoformat()}, {torch.get_num_threads()} torch thread(s), "
          f"torch {torch.__version__}, {cfg.train.dtype}")
    print(f"model: lexicalized, {m.nonterminals} nonterminals, {m.preterminals} preterminals, "
          f"{m.head_classes} head classes, embedding {m.embedding_dim}; "
          f"{cfg.train.method}, batches of {cfg.train.batch_size} ({args.config.name})")
    print(f"corpus: {args.sentences} head-final sentences of 1..{args.max_words} words, mean "
          f"length {statistics.fmean(lengths):.2f}; trained on {args.measure} drawn from it "
          f"at random, mean length {statistics.fmean(sample_lengths):.2f}")
    print(f"measured: one epoch of {args.measure} sentences in {epoch_seconds:.1f} s "
          f"({per_second:.1f} sentences per second, the trainer's training steps only; "
          f"{wall:.1f} s with setup, vocabulary, grammar and checkpoint writing)")
    if args.measure < args.sentences:
        print(f"extrapolated, not measured: one epoch of {args.sentences} sentences would take "
              f"about {whole:.0f} s ({whole / 60:.1f} min) at the same rate")
    else:
        print(f"measured: the whole epoch of {args.sentences} sentences")
    return {"sentences": args.sentences, "measured_sentences": args.measure,
            "sentences_per_second": per_second, "epoch_seconds_measured": epoch_seconds,
            "epoch_seconds_whole": whole, "extrapolated": args.measure < args.sentences,
            "wall_seconds": wall}


if __name__ == "__main__":
    main(sys.argv[1:])
