"""Benchmark: EM throughput with 1 and 2 worker processes, and memory per worker while
streaming online EM over a corpus ten times larger.

    .venv/bin/python scripts/bench_distributed.py                  # the README's figures
    .venv/bin/python scripts/bench_distributed.py --sentences 400 --memory-sentences 2000

Throughput: batch EM (float32, --nonterminals/--preterminals) over --sentences random
sentences of 1..--max-length words, --epochs epochs, run through the `treewright train` command
three ways: 1 process with 1 thread, 2 worker processes (`--workers 2`) with 1 thread each, and
1 process with 2 threads. The figure is the median over epochs of the run's own
`sentences_per_second` (E-step, all-reduce and M-step; rank 0's clock).

Memory: online EM (10 nonterminals, 20 preterminals), one epoch, over --memory-sentences
sentences of 1..10 words held in memory (the default), then over ten times as many, in memory
and streamed (data.stream_chunk) with 1 and 2 workers. The figure is each process's peak
resident set (VmHWM from /proc, Linux), the largest over the launcher and its workers.

Sentences are random word ids (the inside pass costs the same whatever the words are), seeded.
Prints measured figures and ratios only; asserts nothing.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def write_corpus(path: Path, sentences: int, max_length: int, vocab: int, seed: int) -> None:
    rng = random.Random(seed)
    with open(path, "w", encoding="utf-8") as f:
        for _ in range(sentences):
            n = rng.randint(1, max_length)
            f.write(" ".join(f"w{rng.randrange(vocab)}" for _ in range(n)) + "\n")


def _descendants(pid: int) -> list[int]:
    parents: dict[int, int] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                parents[int(entry.name)] = int(
                    (entry / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
    out, frontier = [], [pid]
    while frontier:
        children = [c for c, p in parents.items() if p in frontier]
        out += children
        frontier = children
    return out


def _hwm_kib(pid: int) -> int | None:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    except OSError:
        return None
    return None


def train(config: Path, run_dir: Path, overrides: list[str], threads: int,
          workers: int | None) -> tuple[list[float], float]:
    """Run `treewright train`; returns (sentences_per_second per epoch, peak MiB of the largest
    process)."""
    env = {**os.environ, "OMP_NUM_THREADS": str(threads)}
    command = [sys.executable, "-m", "treewright", "train", str(config),
               f"output.run_dir={run_dir}", *overrides]
    if workers is not None:
        command += ["--workers", str(workers)]
    proc = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)
    peaks: dict[int, int] = {}
    while proc.poll() is None:
        for pid in [proc.pid, *_descendants(proc.pid)]:
            hwm = _hwm_kib(pid)
            if hwm is not None:
                peaks[pid] = max(peaks.get(pid, 0), hwm)
        time.sleep(0.2)
    stderr = proc.stderr.read()
    if proc.returncode != 0:
        raise SystemExit(f"treewright train failed:\n{stderr}")
    rates = [json.loads(line)["sentences_per_second"]
             for line in (run_dir / "metrics.jsonl").read_text().splitlines()
             if "sentences_per_second" in line]
    return rates, max(peaks.values()) / 1024


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sentences", type=int, default=1_000)
    p.add_argument("--max-length", type=int, default=20)
    p.add_argument("--vocab", type=int, default=2_000)
    p.add_argument("--nonterminals", type=int, default=30)
    p.add_argument("--preterminals", type=int, default=60)
    p.add_argument("--epochs", type=int, default=3)
    p.add_argument("--memory-sentences", type=int, default=20_000)
    p.add_argument("--chunk", type=int, default=2_000, help="data.stream_chunk")
    args = p.parse_args()

    common = [f"model.nonterminals={args.nonterminals}",
              f"model.preterminals={args.preterminals}", "output.progress=false",
              "output.stdout_metrics=false", "output.tensorboard=false", "train.batch_size=32"]
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        corpus = root / "train.txt"
        write_corpus(corpus, args.sentences, args.max_length, args.vocab, seed=0)
        config = root / "bench.yaml"
        config.write_text(f"data:\n  train: {corpus}\n")
        em = [*common, "train.method=em", f"train.epochs={args.epochs}"]
        print(f"EM throughput: {args.sentences} sentences of 1..{args.max_length} words, "
              f"{args.nonterminals} nonterminals, {args.preterminals} preterminals, "
              f"{args.epochs} epochs (median sentences per second over epochs)")
        figures = {}
        for name, threads, workers in [("1 process, 1 thread", 1, None),
                                       ("2 workers, 1 thread each", 1, 2),
                                       ("1 process, 2 threads", 2, None)]:
            rates, _ = train(config, root / f"em-{threads}-{workers}", em, threads, workers)
            figures[name] = statistics.median(rates)
            print(f"  {name:26s} {figures[name]:8.1f} sentences/s", flush=True)
        base = figures["1 process, 1 thread"]
        print(f"  ratios to 1 process, 1 thread: 2 workers "
              f"{figures['2 workers, 1 thread each'] / base:.2f}x, 2 threads "
              f"{figures['1 process, 2 threads'] / base:.2f}x")

        small, large = root / "small.txt", root / "large.txt"
        write_corpus(small, args.memory_sentences, 10, args.vocab, seed=1)
        write_corpus(large, 10 * args.memory_sentences, 10, args.vocab, seed=2)
        # A small grammar here: the figure is about the corpus, not the rule tensors.
        online = [*common, "model.nonterminals=10", "model.preterminals=20",
                  "train.method=online_em", "train.epochs=1"]
        print("\nOnline EM, one epoch, sentences of 1..10 words: peak resident memory of the "
              "largest process (launcher or worker)")
        rows = [("in memory (default)", small, [], None),
                ("in memory (default)", large, [], None),
                ("streamed, 1 process", large, [f"data.stream_chunk={args.chunk}"], None),
                ("streamed, 2 workers", large, [f"data.stream_chunk={args.chunk}"], 2)]
        for k, (name, path, extra, workers) in enumerate(rows):
            cfg = root / f"memory-{k}.yaml"
            cfg.write_text(f"data:\n  train: {path}\n")
            sentences = sum(1 for _ in open(path, encoding="utf-8"))
            rates, peak = train(cfg, root / f"memory-{k}", [*online, *extra], 1, workers)
            print(f"  {name:22s} {sentences:8d} sentences  {peak:8.0f} MiB  "
                  f"({rates[0]:.0f} sentences/s)", flush=True)


if __name__ == "__main__":
    main()
