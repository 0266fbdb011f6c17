"""Benchmark: one training epoch of EM and of gradient training for the default induction
grammar (30 nonterminals, 60 preterminals), and peak memory.

    .venv/bin/python scripts/bench_train.py                 # 10,000 sentences of 1..30 words
    .venv/bin/python scripts/bench_train.py --sentences 500 # a quick run

Sentences are random word ids (the inside pass costs the same whatever the words are), with
lengths drawn uniformly from 1..max-length, seeded. Target on a 2-core machine: an epoch in
under 3 minutes and peak memory under 4 GiB. Prints measured figures only; asserts nothing.
"""

from __future__ import annotations

import argparse
import random
import resource
import time

import torch

from treewright.allocator import tune_allocator
from treewright.corpus import length_batches
from treewright.params import NeuralParams, TabularParams
from treewright.train import updates
from treewright.inference import encode_ids
from treewright.train.estep import add_counts, batch_counts, make_batch, zero_counts
from treewright import engine


def peak_mib() -> float:
    # ru_maxrss is in KiB on Linux.
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main() -> None:
    tune_allocator()
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sentences", type=int, default=10_000)
    p.add_argument("--max-length", type=int, default=30)
    p.add_argument("--vocab", type=int, default=5_000)
    p.add_argument("--nonterminals", type=int, default=30)
    p.add_argument("--preterminals", type=int, default=60)
    p.add_argument("--batch-size", type=int, default=32)
    p.add_argument("--dtype", choices=["float32", "float64"], default="float32")
    p.add_argument("--skip-neural", action="store_true")
    args = p.parse_args()
    dtype = getattr(torch, args.dtype)
    rng = random.Random(0)
    sentences = [[rng.randrange(args.vocab) for _ in range(rng.randint(1, args.max_length))]
                 for _ in range(args.sentences)]
    words = sum(map(len, sentences))
    groups = length_batches([len(s) for s in sentences], args.batch_size)
    batches = [make_batch(g, sentences, None, dtype) for g in groups]
    print(f"{args.sentences} sentences, {words} words, {len(batches)} batches of <= "
          f"{args.batch_size}; grammar {args.nonterminals} NT / {args.preterminals} T, "
          f"V = {args.vocab}, {args.dtype}, {torch.get_num_threads()} threads")

    gen = torch.Generator().manual_seed(0)
    tabular = TabularParams(args.nonterminals, args.preterminals, args.vocab, 1.0, gen, dtype)
    with torch.no_grad():
        rules = tabular.rules()
    start = time.perf_counter()
    total = zero_counts(rules)
    for batch in batches:
        total = add_counts(total, batch_counts(rules, batch))
    tabular.set_log_probs(updates.maximum_likelihood(total, rules))
    em = time.perf_counter() - start
    print(f"EM epoch:                 {em:8.1f} s  ({args.sentences / em:7.1f} sentences/s), "
          f"peak memory {peak_mib():7.0f} MiB")

    models = [("tabular", tabular)]
    if not args.skip_neural:
        models.append(("neural", NeuralParams(args.nonterminals, args.preterminals, args.vocab,
                                              generator=gen, dtype=dtype)))
    for name, model in models:
        optimizer = torch.optim.Adam(model.parameters(), lr=1e-3, betas=(0.75, 0.999))
        start = time.perf_counter()
        for batch in batches:
            rules = model.rules()
            logz = engine.log_partition(rules.root, rules.binary,
                                        encode_ids(rules.lexical, batch.ids,
                                                   batch.lengths).terminal,
                                        batch.lengths)
            loss = -logz.sum() / batch.words
            optimizer.zero_grad()
            loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), 3.0)
            optimizer.step()
        elapsed = time.perf_counter() - start
        print(f"gradient epoch ({name:7s}): {elapsed:8.1f} s  "
              f"({args.sentences / elapsed:7.1f} sentences/s), peak memory {peak_mib():7.0f} MiB")


if __name__ == "__main__":
    main()
