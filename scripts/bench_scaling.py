"""How the engine's cost grows: forward+backward time against sentence length n and against the
number of nonterminals, for dense, low-rank and independent-productions rules, with the
exponents fitted by least squares on log time against log size.

    .venv/bin/python scripts/bench_scaling.py --threads 1        # about 5 minutes, quiet host
    .venv/bin/python scripts/bench_scaling.py --threads 1 --clock cpu   # on a busy machine
    .venv/bin/python scripts/bench_scaling.py --quick            # smoke run, tiny sizes
    .venv/bin/python scripts/bench_scaling.py --threads 1 --json scaling.json

Every pass is timed as a training step asks: forward, then the backward with the rule and the
word gradients. Sizes (batch of 32 sentences, all of length n; T = 2 NT preterminals, the
proportion of the issue's 1,024 / 2,048 grammar; low-rank rank R = NT):
- against n = 5, 10, 20, 40, 70, 100 at NT = 64, T = 128, for all three passes;
- against NT = 64, 128, ..., 4,096 at n = 10. Dense rules stop at NT = 256: their rule tensor
  has NT (3 NT)^2 entries, 0.6 GB of float32 at NT = 256 and 4.8 GB at NT = 512, which a
  forward+backward holds about three times over (rules, their exp, their gradient), far past the
  issue's 4 GiB. The factored passes hold NT x 3 NT factors (0.2 GB each at NT = 4,096) and
  fit at every size.
Each timing is the minimum of its repeats after one warm-up call (the machine is shared), in
wall time or, with `--clock cpu`, in this process's CPU time (the matmul rate in the same
clock), which leaves out the time slices other programs take. For
the factored passes the table also gives time / matrix-product floor, the floor counted as
`bench_inside.py` (low-rank) and `bench_independent.py` count it at the matmul rate of this
process. The whole-range exponent mixes regimes (per-call overhead at small sizes, the
products' n^2 against the split sums' n^3 terms); the upper-half exponent, over the larger half
of the sizes, is the one that speaks for big problems.
"""

from __future__ import annotations

import argparse
import datetime
import json
import sys
import time
from pathlib import Path

import torch

from treewright.allocator import tune_allocator
from treewright.engine.independent import independent_log_partition
from treewright.engine.inside import log_partition
from treewright.engine.lowrank import lowrank_log_partition

SCRIPTS = Path(__file__).resolve().parent
if str(SCRIPTS) not in sys.path:
    sys.path.insert(0, str(SCRIPTS))  # the sibling scripts, when this one is loaded by path
# The timer, the matmul rate, the fit and the random problems are the sibling benchmarks'.
from bench_independent import independent_work, random_problem  # noqa: E402
from bench_inside import (best_time, fit_exponent, lowrank_work, matmul_gflops,  # noqa: E402
                          progress, random_grammar, random_lowrank)

PASSES = ("dense", "low-rank", "independent")
FULL = {"batch": 32, "lengths": [5, 10, 20, 40, 70, 100], "length_nt": 64,
        "nts": [64, 128, 256, 512, 1024, 2048, 4096], "nts_n": 10, "dense_max_nt": 256}
QUICK = {"batch": 2, "lengths": [3, 5, 8], "length_nt": 6,
         "nts": [4, 8, 16], "nts_n": 5, "dense_max_nt": 8}


def time_pass(kind: str, nt: int, n: int, batch: int, repeats: int,
              clock=time.perf_counter) -> float:
    """Minimum forward+backward time of one pass on a random problem, T = 2 NT (rank NT)."""
    t = 2 * nt
    if kind == "dense":
        root, binary, terminal, lengths = random_grammar(nt, t, n, batch)
        binary.requires_grad_()
        terminal.requires_grad_()  # rule and word gradients, as in training

        def step():
            log_partition(root, binary, terminal, lengths).sum().backward()
            binary.grad = terminal.grad = None
    elif kind == "low-rank":
        root, u, v, w, terminal, lengths = random_lowrank(nt, t, nt, n, batch)

        def step():
            lowrank_log_partition(root, u, v, w, terminal, lengths).sum().backward()
            u.grad = v.grad = w.grad = terminal.grad = None
    elif kind == "independent":
        root, left, right, terminal, lengths = random_problem(nt, t, n, batch)

        def step():
            independent_log_partition(root, left, right, terminal, lengths).sum().backward()
            left.grad = right.grad = terminal.grad = None
    else:
        raise ValueError(f"unknown pass {kind!r}")
    return best_time(step, repeats, clock=clock)


def floor_gflop(kind: str, nt: int, n: int, batch: int) -> float | None:
    """Matrix-product GFLOP of one forward+backward (None for dense rules: no floor counted)."""
    if kind == "low-rank":
        return lowrank_work(nt, 2 * nt, nt, n) * batch / 1e9
    if kind == "independent":
        return independent_work(nt, 2 * nt, n) * batch / 1e9
    return None


def fits(sizes: list[int], times: list[float]) -> dict:
    """Exponent over every size and over the larger half (at least two points each)."""
    half = len(sizes) // 2 if len(sizes) >= 4 else 0
    return {"exponent_all": fit_exponent(sizes, times) if len(sizes) >= 2 else None,
            "exponent_upper": fit_exponent(sizes[half:], times[half:])
            if len(sizes) - half >= 2 else None, "upper_from": sizes[half]}


def sweep(kind: str, axis: str, sizes: list[int], fixed: int, batch: int, repeats: int,
          clock=time.perf_counter) -> dict:
    """Times of one pass along one axis ("n": lengths at NT = fixed; "nt": NT at n = fixed)."""
    times, floors = [], []
    for size in sizes:
        nt, n = (fixed, size) if axis == "n" else (size, fixed)
        progress(f"{kind}: NT={nt} T={2 * nt} n={n} batch={batch}")
        times.append(time_pass(kind, nt, n, batch, repeats, clock))
        floors.append(floor_gflop(kind, nt, n, batch))
    return {"pass": kind, "axis": axis, "sizes": sizes, "fixed": fixed, "fb_s": times,
            "floor_gflop": floors, **fits(sizes, times)}


def run(cfg: dict, repeats: int, clock=time.perf_counter) -> dict:
    rate = matmul_gflops(repeats, clock)
    sweeps = []
    for kind in PASSES:
        sweeps.append(sweep(kind, "n", cfg["lengths"], cfg["length_nt"], cfg["batch"], repeats,
                            clock))
    for kind in PASSES:
        nts = [x for x in cfg["nts"] if kind != "dense" or x <= cfg["dense_max_nt"]]
        sweeps.append(sweep(kind, "nt", nts, cfg["nts_n"], cfg["batch"], repeats, clock))
    rate = max(rate, matmul_gflops(repeats, clock))
    for s in sweeps:
        s["floor_ratio"] = [None if g is None else t / (g / rate)
                            for t, g in zip(s["fb_s"], s["floor_gflop"])]
    return {"matmul_gflops": rate, "sweeps": sweeps}


def _cell(seconds: float, ratio: float | None) -> str:
    return f"{seconds:.4f}" + ("" if ratio is None else f" ({ratio:.1f}x)")


def print_tables(r: dict) -> None:
    print(f"engine scaling, {r['date']}, torch {r['torch']}, {r['threads']} threads, batch "
          f"{r['batch']}, T = 2 NT, low-rank R = NT, min of {r['repeats']} repeats in "
          f"{'CPU' if r['clock'] == 'cpu' else 'wall'} time; "
          f"matmul {r['matmul_gflops']:.1f} GFLOP/s")
    print("forward+backward seconds (in brackets: time / matrix-product floor)")
    for axis, label in (("n", "n"), ("nt", "NT")):
        rows = [s for s in r["sweeps"] if s["axis"] == axis]
        fixed = "NT" if axis == "n" else "n"
        print(f"against {label}, {fixed} = {rows[0]['fixed']}:")
        sizes = sorted({x for s in rows for x in s["sizes"]})
        print(f"{label:>6} " + " ".join(f"{s['pass']:>18}" for s in rows))
        for size in sizes:
            cells = []
            for s in rows:
                if size in s["sizes"]:
                    i = s["sizes"].index(size)
                    cells.append(_cell(s["fb_s"][i], s["floor_ratio"][i]))
                else:
                    cells.append("-")
            print(f"{size:>6} " + " ".join(f"{c:>18}" for c in cells))
        for name in ("exponent_all", "exponent_upper"):
            cells = [("-" if s[name] is None else f"{s[name]:.2f}") for s in rows]
            what = "fitted exponent, all" if name == "exponent_all" else "upper half"
            print(f"{what:>27}: " + ", ".join(
                f"{s['pass']} {c}" + (f" ({label} >= {s['upper_from']})"
                                      if name == "exponent_upper" else "")
                for s, c in zip(rows, cells)))


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="tiny sizes, for a smoke run")
    parser.add_argument("--repeats", type=int, default=None,
                        help="timed repeats per point, after a warm-up (default 2, quick 1)")
    parser.add_argument("--threads", type=int, default=None,
                        help="torch threads; 1 gives steadier times on a shared machine")
    parser.add_argument("--clock", choices=["wall", "cpu"], default="wall",
                        help="wall time, or this process's CPU time (steadier on a shared "
                             "machine; meant for one thread), for the passes and the matmul "
                             "rate alike")
    parser.add_argument("--json", default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    tune_allocator()
    if args.threads is not None:
        torch.set_num_threads(args.threads)
    cfg = QUICK if args.quick else FULL
    repeats = args.repeats or (1 if args.quick else 2)
    result = {"date": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M"),
              "torch": torch.__version__, "threads": torch.get_num_threads(),
              "repeats": repeats, "quick": args.quick, "clock": args.clock, **cfg,
              **run(cfg, repeats, time.process_time if args.clock == "cpu" else time.perf_counter)}
    print_tables(result)
    if args.json:
        with open(args.json, "w") as out:
            json.dump(result, out, indent=2)
    return result


if __name__ == "__main__":
    main()
