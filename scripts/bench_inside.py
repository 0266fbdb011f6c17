"""Benchmark of the inside/outside engine, as ratios measured in one process.

    .venv/bin/python scripts/bench_inside.py                 # full run, writes bench_inside.json
    .venv/bin/python scripts/bench_inside.py --quick         # smoke run on tiny sizes
    .venv/bin/python scripts/bench_inside.py --json out.json --repeats 9 --threads 1

Throughput ratio = dense work / time / (1024 x 1024 float32 matmul GFLOP/s of this process).
Dense work per sentence: for each width w and each of the n-w+1 spans, 2(w-1)S^2 flops for the
split sums plus 2 S^2 NT for the rule contraction (S = NT + T); forward+backward counts three
times the forward. Other programs share the CPU, so every timing is the minimum of its repeats
and the matmul rate is the best of two measurements (before and after the engine timings).
Peak memory is read from /proc/self/status (VmHWM) of one subprocess per configuration, relative
to a subprocess that only imports torch (for the low-rank rules, one that has also loaded their
compiled loops).
"""

from __future__ import annotations

import argparse
import datetime
import json
import math
import os
import subprocess
import sys
import time
from dataclasses import asdict, dataclass

import torch

from treewright.allocator import tune_allocator
from treewright.engine.inside import log_partition
from treewright.engine.lowrank import lowrank_log_partition
from treewright.engine.reference import reference_inside

BATCH = 32


@dataclass
class Dense:
    """One dense-grammar configuration and the ratios the issue asks of it (None: no target)."""
    nt: int
    t: int
    n: int
    target_fwd: float | None
    target_fb: float | None


FULL_DENSE = [Dense(30, 60, 20, 2.5, 2.0), Dense(30, 60, 40, 3.0, 2.5),
              Dense(60, 120, 20, None, 3.0)]
QUICK_DENSE = [Dense(6, 10, 6, None, None), Dense(6, 10, 10, None, None)]
FULL_SCALING = [5, 10, 15, 20, 30, 40, 50, 60, 80, 100]  # past 60 to show the slope rising
QUICK_SCALING = [4, 6, 8]


def progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def best_time(fn, repeats: int, warm_up: bool = True, clock=time.perf_counter) -> float:
    """Minimum time of `repeats` calls, after one warm-up call unless told otherwise. `clock`:
    wall time, or `time.process_time`, this process's CPU time, which leaves out the time
    slices other programs take on a shared machine (at one thread it is the wall time of a
    quiet machine, less the cache and memory-bandwidth contention that remains)."""
    if warm_up:
        fn()
    best = math.inf
    for _ in range(repeats):
        start = clock()
        fn()
        best = min(best, clock() - start)
    return best


def matmul_gflops(repeats: int, clock=time.perf_counter) -> float:
    a, b = torch.randn(1024, 1024), torch.randn(1024, 1024)
    return 2 * 1024 ** 3 / best_time(lambda: a @ b, repeats * 3, clock=clock) / 1e9


def dense_work(nt: int, t: int, n: int) -> float:
    """Forward flops of one sentence under the dense count above."""
    s = nt + t
    return float(sum((n - w + 1) * (2 * (w - 1) * s * s + 2 * s * s * nt) for w in range(2, n + 1)))


def random_grammar(nt: int, t: int, n: int, batch: int, dtype=torch.float32, seed: int = 0):
    """A random dense grammar and random word scores: (root, binary, terminal, lengths)."""
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    root = torch.randn(nt, generator=gen, dtype=torch.float64).log_softmax(0)
    binary = torch.randn(nt, s * s, generator=gen, dtype=torch.float64).log_softmax(-1)
    terminal = torch.randn(batch, n, t, generator=gen, dtype=torch.float64) - 3.0
    lengths = torch.full((batch,), n, dtype=torch.long)
    return root.to(dtype), binary.view(nt, s, s).to(dtype), terminal.to(dtype), lengths


def time_dense(cfg: Dense, repeats: int) -> tuple[float, float]:
    root, binary, terminal, lengths = random_grammar(cfg.nt, cfg.t, cfg.n, BATCH)
    binary.requires_grad_()
    terminal.requires_grad_()

    def forward():
        with torch.no_grad():
            log_partition(root, binary, terminal, lengths)

    def forward_backward():
        log_partition(root, binary, terminal, lengths).sum().backward()
        binary.grad = terminal.grad = None

    return best_time(forward, repeats), best_time(forward_backward, repeats)


def precision(cfg: Dense) -> dict:
    """float32 against float64: relative error of log Z and of the expected rule counts."""
    out = {}
    for dtype in (torch.float32, torch.float64):
        root, binary, terminal, lengths = random_grammar(cfg.nt, cfg.t, cfg.n, BATCH, dtype)
        binary.requires_grad_()
        logz = log_partition(root, binary, terminal, lengths)
        logz.sum().backward()
        out[dtype] = (logz.detach().double(), binary.grad.double())  # grad = expected counts
    (z32, c32), (z64, c64) = out[torch.float32], out[torch.float64]
    return {"logz_rel_err": float(((z32 - z64).abs() / z64.abs()).max()),
            "counts_rel_err": float(((c32 - c64).abs() / c64.abs().clamp(min=1.0)).max())}


def run_probe(args: list[str], script: str = __file__) -> float:
    """VmHWM in MiB of a subprocess running `script --probe <args>` (idle: just `import torch`);
    `script`: this file, or a sibling benchmark with a `--probe` of its own."""
    env = dict(os.environ)
    src = os.path.join(os.path.dirname(os.path.abspath(script)), "..", "src")
    env["PYTHONPATH"] = os.path.abspath(src) + os.pathsep + env.get("PYTHONPATH", "")
    res = subprocess.run([sys.executable, os.path.abspath(script), "--probe", *args],
                         capture_output=True, text=True, env=env, check=True)
    return float(res.stdout.strip().splitlines()[-1])


def probe(spec: list[str]) -> None:
    """Subprocess body: run one forward+backward of the given configuration, print VmHWM."""
    if spec[0] == "dense":
        nt, t, n, batch = (int(x) for x in spec[1:5])
        root, binary, terminal, lengths = random_grammar(nt, t, n, batch)
        binary.requires_grad_()
        terminal.requires_grad_()  # as in training: rule and word gradients both
        log_partition(root, binary, terminal, lengths).sum().backward()
    elif spec[0] == "lowrank":
        nt, t, rank, n, batch = (int(x) for x in spec[1:6])
        root, u, v, w, terminal, lengths = random_lowrank(nt, t, rank, n, batch)
        lowrank_log_partition(root, u, v, w, terminal, lengths).sum().backward()
    with open("/proc/self/status") as status:
        hwm_kib = next(int(line.split()[1]) for line in status if line.startswith("VmHWM"))
    print(hwm_kib / 1024)


def time_reference(nt: int, t: int, n: int, repeats: int) -> float:
    root, binary, terminal, lengths = random_grammar(nt, t, n, BATCH)
    with torch.no_grad():
        # The reference takes about a minute at n = 20 on a busy machine: one call, no warm-up
        # (it has no caches to warm).
        return best_time(lambda: reference_inside(root, binary, terminal, lengths), repeats,
                         warm_up=False)


def random_lowrank(nt: int, t: int, rank: int, n: int, batch: int, seed: int = 0):
    """Random low-rank factors (Yang, Zhao & Tu 2021) and word scores, all needing gradients
    as in training (the outside pass skips the work of gradients nobody asks for)."""
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    root = torch.randn(nt, generator=gen).log_softmax(0)
    u = torch.randn(nt, rank, generator=gen).log_softmax(1).requires_grad_()
    v = torch.randn(s, rank, generator=gen).log_softmax(0).requires_grad_()
    w = torch.randn(s, rank, generator=gen).log_softmax(0).requires_grad_()
    terminal = (torch.randn(batch, n, t, generator=gen) - 3.0).requires_grad_()
    return root, u, v, w, terminal, torch.full((batch,), n, dtype=torch.long)


def time_lowrank(nt: int, t: int, rank: int, n: int, repeats: int,
                 clock=time.perf_counter) -> float:
    root, u, v, w, terminal, lengths = random_lowrank(nt, t, rank, n, BATCH)

    def forward_backward():
        lowrank_log_partition(root, u, v, w, terminal, lengths).sum().backward()
        u.grad = v.grad = w.grad = terminal.grad = None

    return best_time(forward_backward, repeats, clock=clock)


def lowrank_work(nt: int, t: int, rank: int, n: int) -> float:
    """Matrix-product flops of one sentence's low-rank forward+backward, as engine.lowrank does
    them. Forward: each word projected by both factors V, W (2 x 2TR), and each span of width
    >= 2 multiplied by U (2 NT R) and projected by both (2 x 2 NT R); the backward does two
    products of the same size for each of these. The split sums (elementwise) are left out, so
    work / (matmul flop rate) is a lower bound on the time."""
    spans = n * (n - 1) // 2
    forward = n * 4 * t * rank + spans * 6 * nt * rank
    return 3.0 * forward


def fit_exponent(ns: list[int], times: list[float]) -> float:
    """Least-squares slope of log time against log n."""
    xs, ys = [math.log(n) for n in ns], [math.log(t) for t in times]
    mx, my = sum(xs) / len(xs), sum(ys) / len(ys)
    return sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sum((x - mx) ** 2 for x in xs)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--json", default="bench_inside.json", help="where to write the results")
    parser.add_argument("--quick", action="store_true", help="tiny sizes, for a smoke run")
    parser.add_argument("--repeats", type=int, default=None,
                        help="timed repeats per measurement (default 5, quick 2)")
    parser.add_argument("--threads", type=int, default=None,
                        help="torch threads (default: torch's choice); 1 gives steadier ratios "
                             "when other programs load the CPU")
    parser.add_argument("--probe", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    tuned = tune_allocator()
    if args.threads:
        torch.set_num_threads(args.threads)
    if args.probe:
        if args.probe[0] != "idle":
            probe(args.probe)
        else:
            probe_idle(args.probe[1:] == ["compiled"])
        return 0
    repeats = args.repeats or (2 if args.quick else 5)
    dense = QUICK_DENSE if args.quick else FULL_DENSE
    scaling_ns = QUICK_SCALING if args.quick else FULL_SCALING
    ref_n = 6 if args.quick else 20
    lowrank_cfg = (8, 16, 16, 6) if args.quick else (250, 500, 500, 20)
    small = dense[0]

    result = {"date": datetime.date.today().isoformat(), "torch": torch.__version__,
              "threads": torch.get_num_threads(), "batch": BATCH, "quick": args.quick,
              "repeats": repeats, "allocator_tuned": tuned}
    gflops = matmul_gflops(repeats)
    rows = []
    for cfg in dense:
        progress(f"dense NT={cfg.nt} T={cfg.t} n={cfg.n}")
        fwd, fb = time_dense(cfg, repeats)
        rows.append({**asdict(cfg), "fwd_s": fwd, "fb_s": fb})
    progress("scaling")
    scaling = [time_dense(Dense(small.nt, small.t, n, None, None), repeats)[0] for n in scaling_ns]
    progress("reference")
    ref_fwd = time_reference(small.nt, small.t, ref_n, 1)
    fast_ref_fwd = time_dense(Dense(small.nt, small.t, ref_n, None, None), repeats)[0]
    progress("low-rank")
    lowrank_fb = time_lowrank(*lowrank_cfg, repeats)
    # The same in CPU time against the matmul rate in CPU time: steadier on a shared machine.
    lowrank_fb_cpu = time_lowrank(*lowrank_cfg, repeats, clock=time.process_time)
    gflops_cpu = matmul_gflops(repeats, clock=time.process_time)
    small_fb = time_dense(Dense(small.nt, small.t, lowrank_cfg[3], None, None), repeats)[1]
    gflops = max(gflops, matmul_gflops(repeats))
    result["matmul_gflops"] = gflops

    progress("memory and precision")
    idle = run_probe(["idle"])
    for row in rows:
        work = dense_work(row["nt"], row["t"], row["n"]) * BATCH
        row["fwd_ratio"] = work / row["fwd_s"] / 1e9 / gflops
        row["fb_ratio"] = 3 * work / row["fb_s"] / 1e9 / gflops
        row["peak_gib_above_idle"] = (run_probe(
            ["dense", str(row["nt"]), str(row["t"]), str(row["n"]), str(BATCH)]) - idle) / 1024
    result["dense"] = rows
    result["reference"] = {"n": ref_n, "reference_fwd_s": ref_fwd, "engine_fwd_s": fast_ref_fwd,
                           "speedup": ref_fwd / fast_ref_fwd, "target": 150.0}
    result["precision"] = {**precision(Dense(small.nt, small.t, ref_n, None, None)),
                           "target_logz": 1e-5, "target_counts": 1e-4}
    fit_from = len(scaling_ns) // 2
    result["scaling"] = {"n": scaling_ns, "fwd_s": scaling,
                         "exponent_all": fit_exponent(scaling_ns, scaling),
                         "exponent_long": fit_exponent(scaling_ns[fit_from:], scaling[fit_from:]),
                         "exponent_local": [fit_exponent(scaling_ns[i:i + 2], scaling[i:i + 2])
                                            for i in range(len(scaling_ns) - 1)]}
    nt, t, rank, n = lowrank_cfg
    floor_s = lowrank_work(nt, t, rank, n) * BATCH / 1e9 / gflops
    result["lowrank"] = {
        "matmul_gflop": lowrank_work(nt, t, rank, n) * BATCH / 1e9, "floor_s": floor_s,
        "ratio_ceiling": small_fb / floor_s,
        "floor_ratio": lowrank_fb / floor_s, "floor_target": 1.5,
        "fb_cpu_s": lowrank_fb_cpu, "matmul_gflops_cpu": gflops_cpu,
        "floor_ratio_cpu": lowrank_fb_cpu / (lowrank_work(nt, t, rank, n) * BATCH / 1e9
                                             / gflops_cpu),
        "nt": nt, "t": t, "rank": rank, "n": n, "fb_s": lowrank_fb,
        "sent_per_s": BATCH / lowrank_fb, "dense_sent_per_s": BATCH / small_fb,
        "dense_nt": small.nt, "dense_t": small.t, "ratio": small_fb / lowrank_fb, "target": 0.3,
        "peak_gib_above_idle": (run_probe(
            ["lowrank", str(nt), str(t), str(rank), str(n), str(BATCH)])
            - run_probe(["idle", "compiled"])) / 1024}

    print_table(result)
    with open(args.json, "w") as out:
        json.dump(result, out, indent=2)
    print(f"wrote {args.json}")
    return 0


def probe_idle(compiled: bool = False) -> None:
    """Subprocess body of the baseline: `import torch` alone, or with `compiled` also a
    two-word low-rank call, which loads its compiled loops (numba: about 130 MiB of code and
    runtime, once per process), so that the low-rank peak counts its batch alone."""
    if compiled:
        root, u, v, w, terminal, lengths = random_lowrank(4, 4, 4, 2, 1)
        lowrank_log_partition(root, u, v, w, terminal, lengths).sum().backward()
    with open("/proc/self/status") as status:
        hwm_kib = next(int(line.split()[1]) for line in status if line.startswith("VmHWM"))
    print(hwm_kib / 1024)


def _target(value: float | None) -> str:
    return "-" if value is None else f">= {value:g}"


def print_table(r: dict) -> None:
    print(f"inside engine benchmark, {r['date']}, torch {r['torch']}, {r['threads']} threads, "
          f"batch {r['batch']}, min of {r['repeats']} repeats")
    print(f"matmul 1024x1024 float32: {r['matmul_gflops']:.1f} GFLOP/s")
    print(f"{'NT':>4} {'T':>4} {'n':>3} {'fwd s':>9} {'fwd ratio':>10} {'target':>8} "
          f"{'f+b s':>9} {'f+b ratio':>10} {'target':>8} {'peak GiB':>9}")
    for row in r["dense"]:
        print(f"{row['nt']:>4} {row['t']:>4} {row['n']:>3} {row['fwd_s']:>9.4f} "
              f"{row['fwd_ratio']:>10.2f} {_target(row['target_fwd']):>8} {row['fb_s']:>9.4f} "
              f"{row['fb_ratio']:>10.2f} {_target(row['target_fb']):>8} "
              f"{row['peak_gib_above_idle']:>9.3f}")
    ref = r["reference"]
    print(f"reference per-width forward, n={ref['n']}: {ref['reference_fwd_s']:.3f} s; engine "
          f"{ref['engine_fwd_s']:.4f} s; speed-up {ref['speedup']:.0f}x (target >= 150x)")
    p = r["precision"]
    print(f"float32 vs float64: log Z rel err {p['logz_rel_err']:.1e} (target 1e-5), expected "
          f"counts rel err {p['counts_rel_err']:.1e} (target 1e-4)")
    s = r["scaling"]
    print("scaling, forward s: " + ", ".join(f"n={n}: {t:.4f}" for n, t in zip(s["n"], s["fwd_s"])))
    print(f"  fitted exponent: {s['exponent_all']:.2f} over all n, "
          f"{s['exponent_long']:.2f} over n >= {s['n'][len(s['n']) // 2]}; between neighbours: "
          + ", ".join(f"{a}-{b}: {e:.2f}" for a, b, e in
                      zip(s["n"], s["n"][1:], s["exponent_local"])))
    lr = r["lowrank"]
    print(f"low-rank NT={lr['nt']} T={lr['t']} rank={lr['rank']} n={lr['n']}: f+b "
              f"{lr['fb_s']:.3f} s, {lr['sent_per_s']:.1f} sent/s vs dense "
              f"{lr['dense_sent_per_s']:.1f} sent/s: ratio {lr['ratio']:.2f} (target >= 0.3), "
              f"peak {lr['peak_gib_above_idle']:.3f} GiB (target < 1)")
    print(f"  its matrix products alone are {lr['matmul_gflop']:.1f} GFLOP: at least "
          f"{lr['floor_s']:.3f} s at the matmul rate, so the ratio cannot exceed "
          f"{lr['ratio_ceiling']:.2f} at this thread count")
    print(f"  forward+backward / that floor: {lr['floor_ratio']:.2f} (target <= 1.5); in CPU "
          f"time: {lr['fb_cpu_s']:.3f} s against matmul at {lr['matmul_gflops_cpu']:.1f} "
          f"GFLOP/s, {lr['floor_ratio_cpu']:.2f}")


if __name__ == "__main__":
    sys.exit(main())
