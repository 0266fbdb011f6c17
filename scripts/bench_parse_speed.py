"""Benchmark of parsing throughput against training throughput for the same grammar: sentences
per second of one EM epoch, of the `mbr` decoder and of the `max-rule-product` decoder, and each
decoder's ratio to the training rate (target of issue 24: at least 0.5).

    .venv/bin/python scripts/bench_parse_speed.py                  # 20/30 and 30/60 symbols
    .venv/bin/python scripts/bench_parse_speed.py --quick          # a smoke run, seconds

Grammars: random tabular grammars (`params.TabularParams`, seed 0) of NT/T = 20/30 and 30/60
symbols over the demo corpus's vocabulary; with `--em-epochs E`, the same grammars after E EM
epochs on the benchmark's sentences (trained posteriors: max-rule-product on a refined grammar
leaves out the spans and labels they rule out, exactly, so its cost depends on the numbers,
unlike the dense passes'); with `--grammar PATH`, a grammar file instead (for example a
`treewright refine` run's grammar.pcfg; its sentences are those of `--text`). Every random
symbol is named as a subcategory, `S{i // 2}·{i % 2}` for nonterminal i and `P{j // 2}·{j % 2}`
for preterminal j (two subcategories per coarse symbol, as `refine.split` names them), so that
max-rule-product works over coarse symbols as it does on a refined grammar; mbr does not read
names. With `--unrefined` the symbols are named `S{i}` and `P{j}`, each its own coarse symbol,
so that max-rule-product takes its path for unrefined grammars (a max-semiring pass).
Sentences: the first `--sentences` lines of the demo training set (or `--text`) of at most
`--max-length` words.

Each tool runs as its user runs it: training with `train.batch_size` (32) in the trainer's
float32 (`estep.batch_counts` per batch, subnormal floats flushed as training flushes them,
then the maximum-likelihood update), the decoders
through `decode.decode` with `parse`'s batch size through a rule tensor (32) in `parse`'s
float64, without the trees' own log-probabilities (`parse` computes them only for `--scores`;
on a refined grammar they cost max-rule-product about a tenth more). One process, one torch
thread (`--threads`). The three measurements alternate (training, mbr, mrp, repeated
`--repeats` times) so that the machine's drift hits all alike, and the best of the repeats is
kept, in wall time and, for a shared host, in the process's CPU time (ratios in both). Prints
measured figures only; asserts nothing. `main` returns the figures.
"""

from __future__ import annotations

import argparse
import datetime
import os
import time
from pathlib import Path

import torch

from treewright import decode
from treewright.allocator import tune_allocator
from treewright.corpus import length_batches
from treewright.grammar import Grammar, fine_name, load_grammar
from treewright.params import TabularParams
from treewright.params.tabular import rules_to_grammar, tabular_from_grammar
from treewright.train import updates
from treewright.train.estep import add_counts, batch_counts, make_batch, zero_counts
from treewright.vocab import Vocabulary

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "src" / "treewright" / "data" / "demo"
TARGET = 0.5  # issue 24: parse at least half the sentences per second of a training epoch
SIZES = ((20, 30), (30, 60))
DECODERS = ("mbr", "max-rule-product")


def demo_sentences(count: int, max_length: int, path: Path = DEMO / "train.txt"
                   ) -> list[list[str]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    sentences = [line.split() for line in lines if 0 < len(line.split()) <= max_length]
    return sentences[:count]


def split_names(prefix: str, count: int) -> list[str]:
    """`count` symbol names, two subcategories per coarse symbol: P0·0, P0·1, P1·0, ..."""
    return [fine_name(f"{prefix}{i // 2}", i % 2) for i in range(count)]


def plain_names(prefix: str, count: int) -> list[str]:
    """`count` symbol names, each its own coarse symbol: P0, P1, ..."""
    return [f"{prefix}{i}" for i in range(count)]


def random_model(nt: int, t: int, vocab: Vocabulary, refined: bool = True
                 ) -> tuple[TabularParams, Grammar]:
    """A random tabular model (float32, seed 0) and the same rules as a `Grammar` (float64),
    its symbols named as subcategories (`split_names`) or not (`plain_names`)."""
    model = TabularParams(nt, t, len(vocab), 1.0, torch.Generator().manual_seed(0), torch.float32)
    with torch.no_grad():
        rules = model.rules()
    names = split_names if refined else plain_names
    return model, rules_to_grammar(rules, names("S", nt), names("P", t), vocab)


def em_epoch(model: TabularParams, batches) -> None:
    """One EM epoch as the trainer runs it: expected counts per batch, then the M-step."""
    with torch.no_grad():
        rules = model.rules()
        total = zero_counts(rules)
        for batch in batches:
            total = add_counts(total, batch_counts(rules, batch))
        model.set_log_probs(updates.maximum_likelihood(total, rules))


def load_average() -> str:
    try:
        return " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:
        return "unavailable"


def main(argv: list[str] | None = None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sentences", type=int, default=200)
    p.add_argument("--max-length", type=int, default=20)
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--threads", type=int, default=1, help="torch threads")
    p.add_argument("--train-batch-size", type=int, default=32)
    p.add_argument("--parse-batch-size", type=int, default=decode.DECODE_BATCH,
                   help="sentences per decoding call (default: parse's)")
    p.add_argument("--unrefined", action="store_true",
                   help="symbols named S0, P0, ... (each its own coarse symbol)")
    p.add_argument("--em-epochs", type=int, default=0,
                   help="train each random grammar this many EM epochs on the sentences first")
    p.add_argument("--grammar", type=Path,
                   help="time this grammar file instead of the random ones")
    p.add_argument("--text", type=Path, default=DEMO / "train.txt",
                   help="the sentences (one per line, words separated by spaces)")
    p.add_argument("--flush-subnormals", action="store_true",
                   help="kept for the commands of earlier measurements: training's float32 "
                        "E-step now flushes subnormal floats itself (estep.batch_counts), so "
                        "every EM epoch here is timed flushed, with or without it")
    p.add_argument("--quick", action="store_true",
                   help="a smoke run: 12 sentences of at most 8 words, grammars 4/6, one repeat")
    args = p.parse_args(argv)
    sizes = SIZES
    if args.quick:
        args.sentences, args.max_length, args.repeats, sizes = 12, 8, 1, ((4, 6),)
    tune_allocator()
    torch.set_num_threads(args.threads)
    sentences = demo_sentences(args.sentences, args.max_length, args.text)
    if args.grammar is not None:
        loaded = load_grammar(args.grammar)
        vocab = loaded.vocab
    else:
        vocab = Vocabulary(sorted({w for s in sentences for w in s}))
    ids = [vocab.encode(s) for s in sentences]
    for k, (words, row) in enumerate(zip(sentences, ids)):
        if -1 in row:
            p.error(f"{args.text}: sentence {k + 1} has {words[row.index(-1)]!r}, which the "
                    f"grammar's vocabulary lacks (and it has no unknown-word token)")
    groups = length_batches([len(s) for s in sentences], args.train_batch_size)
    batches = [make_batch(g, ids, None, torch.float32) for g in groups]
    words = sum(map(len, sentences))
    print(f"{datetime.datetime.now(datetime.timezone.utc):%Y-%m-%d %H:%M UTC}; torch "
          f"{torch.__version__}, {torch.get_num_threads()} thread(s); load average "
          f"{load_average()}")
    print(f"{len(sentences)} {'demo ' if args.text == DEMO / 'train.txt' else ''}sentences of "
          f"at most {args.max_length} words ({words} words); "
          f"training batch {args.train_batch_size} float32, parsing batch "
          f"{args.parse_batch_size} float64; best of {args.repeats} alternated repeats; "
          + (f"grammar {args.grammar}" if args.grammar is not None else
             "symbols " + ("unrefined (S0, P0, ...)" if args.unrefined else
                           "named S0·0, S0·1, ...")
             + (f", after {args.em_epochs} EM epochs" if args.em_epochs else "")))
    figures: dict = {"sentences": len(sentences), "grammars": []}
    if args.grammar is not None:
        sizes = ((len(loaded.nonterminals), len(loaded.preterminals)),)
    for nt, t in sizes:
        if args.grammar is not None:
            model, grammar = tabular_from_grammar(loaded, vocab, dtype=torch.float32), loaded
        else:
            model, grammar = random_model(nt, t, vocab, not args.unrefined)
            names = split_names if not args.unrefined else plain_names
            for _ in range(args.em_epochs):
                em_epoch(model, batches)
            if args.em_epochs:
                with torch.no_grad():
                    grammar = rules_to_grammar(model.rules(), names("S", nt), names("P", t), vocab)
        best = {"train": float("inf"), **{d: float("inf") for d in DECODERS}}
        cpu = dict(best)
        for _ in range(args.repeats):
            # Alternated so that the machine's drift hits all three alike. Each epoch moves the
            # model; the decoders keep the grammar they started with (the EM epoch does the
            # same dense work whatever its numbers are).
            for tool in ("train",) + DECODERS:
                began, began_cpu = time.perf_counter(), time.process_time()
                if tool == "train":
                    em_epoch(model, batches)
                else:
                    decode.decode(grammar, sentences, tool, args.parse_batch_size, torch.float64,
                                  tree_logprobs=False)
                best[tool] = min(best[tool], time.perf_counter() - began)
                cpu[tool] = min(cpu[tool], time.process_time() - began_cpu)
        rates = {k: len(sentences) / v for k, v in best.items()}
        ratios = {d: rates[d] / rates["train"] for d in DECODERS}
        cpu_ratios = {d: cpu["train"] / cpu[d] for d in DECODERS}
        print(f"grammar {nt}/{t}: EM epoch {best['train']:7.2f} s ({rates['train']:8.1f} "
              f"sentences/s; CPU {cpu['train']:.2f} s)")
        for d in DECODERS:
            print(f"  {d:16s} {best[d]:7.2f} s ({rates[d]:8.1f} sentences/s)  ratio to training "
                  f"{ratios[d]:6.3f} (target >= {TARGET}); in CPU time {cpu[d]:.2f} s, ratio "
                  f"{cpu_ratios[d]:.3f}", flush=True)
        figures["grammars"].append({"nt": nt, "t": t, "seconds": best, "rates": rates,
                                    "ratios": ratios, "cpu_seconds": cpu,
                                    "cpu_ratios": cpu_ratios})
    return figures


if __name__ == "__main__":
    main()
