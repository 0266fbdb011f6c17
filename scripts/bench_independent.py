"""Benchmark of the independent-productions inside pass (Liu, Yang, Kim & Tu 2023) against its
own matrix-product floor, measured in one process.

    .venv/bin/python scripts/bench_independent.py --threads 1           # NT 1,024, T 2,048
    .venv/bin/python scripts/bench_independent.py --quick               # smoke run, tiny sizes
    .venv/bin/python scripts/bench_independent.py --nt 512 --t 1024 --json out.json

The floor is counted as `scripts/bench_inside.py` counts the low-rank pass's: the flops of the
matrix products the engine cannot avoid, divided by this process's float32 1024 x 1024 matmul
rate (the best of two measurements, before and after the engine timing). Forward: each word
projected onto the parents by both factors (2 x 2 T NT), each span of width >= 2 projected by
both (2 x 2 NT NT); the backward does two products of the same size for each of these. The
split sums (elementwise) are left out, so the floor is a lower bound on the time, and the
printed ratio (time / floor) is at least 1. Forward+backward asks for the rule and the word
gradients, as a training step does. Every timing is the minimum of its repeats (the machine is
shared). Peak memory is VmHWM of a subprocess running one forward+backward, less that of a
subprocess that only imports torch.
"""

from __future__ import annotations

import argparse
import datetime
import json
import sys
from pathlib import Path

import torch

from treewright.allocator import tune_allocator
from treewright.engine.independent import independent_log_partition

SCRIPTS = Path(__file__).resolve().parent
if str(SCRIPTS) not in sys.path:
    sys.path.insert(0, str(SCRIPTS))  # the sibling scripts, when this one is loaded by path
from bench_inside import best_time, matmul_gflops, run_probe  # noqa: E402  (shared)


def progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def independent_work(nt: int, t: int, n: int) -> float:
    """Matrix-product flops of one sentence's forward+backward (see the module docstring)."""
    spans = n * (n - 1) // 2
    forward = n * 4 * t * nt + spans * 4 * nt * nt
    return 3.0 * forward


def random_problem(nt: int, t: int, n: int, batch: int, seed: int = 0):
    """Random factors and word scores, the factors and words needing gradients as in training."""
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    root = torch.randn(nt, generator=gen).log_softmax(0)
    left = torch.randn(nt, s, generator=gen).log_softmax(1).requires_grad_()
    right = torch.randn(nt, s, generator=gen).log_softmax(1).requires_grad_()
    terminal = (torch.randn(batch, n, t, generator=gen) - 3.0).requires_grad_()
    return root, left, right, terminal, torch.full((batch,), n, dtype=torch.long)


def forward_backward(problem) -> float:
    root, left, right, terminal, lengths = problem
    logz = independent_log_partition(root, left, right, terminal, lengths)
    logz.sum().backward()
    left.grad = right.grad = terminal.grad = None
    return float(logz.detach().mean())


def vm_hwm_mib() -> float:
    with open("/proc/self/status") as status:
        return next(int(line.split()[1]) for line in status if line.startswith("VmHWM")) / 1024


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nt", type=int, default=1024)
    parser.add_argument("--t", type=int, default=2048)
    parser.add_argument("--n", type=int, default=20)
    parser.add_argument("--batch", type=int, default=32)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--quick", action="store_true", help="tiny sizes, one repeat")
    parser.add_argument("--json", default=None, help="also write the figures here")
    parser.add_argument("--probe", nargs="*", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.threads is not None:
        torch.set_num_threads(args.threads)
    if args.probe is not None:  # subprocess body: one forward+backward, then the peak
        if args.probe:
            nt, t, n, batch = (int(x) for x in args.probe)
            forward_backward(random_problem(nt, t, n, batch))
        print(vm_hwm_mib())
        return {}
    if args.quick:
        args.nt, args.t, args.n, args.batch, args.repeats = 16, 32, 8, 4, 1
    tune_allocator()
    progress(f"matmul rate, then NT={args.nt} T={args.t} n={args.n} batch={args.batch}")
    rate = matmul_gflops(args.repeats)
    problem = random_problem(args.nt, args.t, args.n, args.batch)
    fb_s = best_time(lambda: forward_backward(problem), args.repeats)
    rate = max(rate, matmul_gflops(args.repeats))
    work = independent_work(args.nt, args.t, args.n) * args.batch / 1e9
    floor_s = work / rate
    spec = [str(x) for x in (args.nt, args.t, args.n, args.batch)]
    peak_mib = run_probe(spec, __file__) - run_probe([], __file__)
    result = {"date": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d"),
              "torch": torch.__version__, "threads": torch.get_num_threads(),
              "repeats": args.repeats, "nt": args.nt, "t": args.t, "n": args.n,
              "batch": args.batch, "matmul_gflops": rate, "matmul_gflop": work,
              "floor_s": floor_s, "fb_s": fb_s, "ratio": fb_s / floor_s, "target": 2.0,
              "sent_per_s": args.batch / fb_s, "peak_mib_above_idle": peak_mib}
    print(f"independent productions, {result['date']}, torch {result['torch']}, "
          f"{result['threads']} threads, min of {args.repeats} repeats")
    print(f"NT={args.nt} T={args.t} n={args.n} batch={args.batch}: forward+backward "
          f"{fb_s:.3f} s ({result['sent_per_s']:.1f} sent/s); its matrix products are "
          f"{work:.1f} GFLOP, at {rate:.1f} GFLOP/s at least {floor_s:.3f} s: ratio "
          f"{result['ratio']:.2f} (target <= 2); peak {peak_mib:.0f} MiB above idle")
    if args.json:
        with open(args.json, "w") as out:
            json.dump(result, out, indent=2)
    return result


if __name__ == "__main__":
    main()
