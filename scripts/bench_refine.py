"""Benchmark: two split-merge cycles on 3,000 treebank sentences (Turkish Web + Wiki treebanks,
phrase labels from the head's part of speech), with the default cycle settings.

    .venv/bin/python scripts/bench_refine.py [--sentences 3000] [--cycles 2]

Prints the seconds per cycle, the training log-likelihood per word after each, and the peak
resident memory of the process. Not a timed test: numbers depend on the machine and its load.
"""

from __future__ import annotations

import argparse
import resource
import sysconfig
import time
from pathlib import Path

import torch

from treewright.allocator import tune_allocator
from treewright.corpus import ReadOptions, read_corpus
from treewright.refine import (CycleSettings, WordClasses, cnf_tree, estimate_coarse, map_words,
                               tree_cycle, tree_loglik, tree_set)


def treebank_files() -> list[Path]:
    data = Path(sysconfig.get_paths()["purelib"]) / "data"
    return [data / "web.conllu", data / "wiki.conllu"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sentences", type=int, default=3000)
    parser.add_argument("--cycles", type=int, default=2)
    args = parser.parse_args()
    tune_allocator()
    trees = []
    for path in treebank_files():
        corpus = read_corpus(path, "conllu", ReadOptions(skip_bad=True, max_length=40))
        trees.extend(cnf_tree(s.tree, horizontal=0) for s in corpus.sentences)
    trees = [t for t in trees if not t.is_preterminal()][:args.sentences]
    classes = WordClasses.fit((w for t in trees for w in t.leaves()), 1, 3)
    trees = [map_words(t, classes) for t in trees]
    words = sum(len(t.leaves()) for t in trees)
    began = time.perf_counter()
    lg = estimate_coarse(trees)
    ts = tree_set(lg, trees)
    print(f"{len(trees)} trees, {words} words, {len(lg.symbols)} coarse symbols, "
          f"{len(lg.rules)} binary rules; setup {time.perf_counter() - began:.1f} s; "
          f"torch threads {torch.get_num_threads()}")
    print(f"cycle 0: loglik/word {float(tree_loglik(lg, ts).sum()) / words:.4f}")
    generator = torch.Generator().manual_seed(0)
    for cycle in range(1, args.cycles + 1):
        began = time.perf_counter()
        lg = tree_cycle(lg, ts, CycleSettings(), generator)
        seconds = time.perf_counter() - began
        print(f"cycle {cycle}: {seconds:.1f} s, {lg.num_fine()} subcategories (K={lg.width}), "
              f"loglik/word {float(tree_loglik(lg, ts).sum()) / words:.4f}")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kilobytes on Linux
    print(f"peak resident memory {peak:.0f} MiB")


if __name__ == "__main__":
    main()
