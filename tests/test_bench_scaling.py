"""scripts/bench_scaling.py: the exponent it fits is the least-squares slope on log-log axes, and
a smoke run reports its exponents by that rule (no timing is asserted)."""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_scaling",
                                               REPO / "scripts" / "bench_scaling.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_scaling"] = bench
_spec.loader.exec_module(bench)


@pytest.mark.parametrize("power, sizes", [(3.0, [5, 10, 20, 40, 70, 100]),
                                          (2.0, [64, 128, 256, 512, 1024, 2048, 4096]),
                                          (1.3, [3, 4])])
def test_the_fitted_exponent_is_numpys_least_squares_slope(power, sizes):
    # Reference: numpy.polyfit of degree 1 on (log size, log time), its leading coefficient.
    # Synthetic times c * size^power with seeded multiplicative noise, not measured ones.
    rng = np.random.default_rng(7)
    times = [0.002 * s ** power * math.exp(rng.normal(0, 0.1)) for s in sizes]
    slope = np.polyfit(np.log(sizes), np.log(times), 1)[0]
    assert bench.fit_exponent(sizes, times) == pytest.approx(slope, rel=1e-12)


def test_an_exact_power_law_gives_its_power_back():
    # Reference: the definition (log t = p log n + log c has slope p), no fit needed.
    sizes = [5, 10, 20, 40]
    assert bench.fit_exponent(sizes, [3.5 * s ** 2.7 for s in sizes]) == pytest.approx(2.7)


def test_a_quick_run_reports_exponents_by_the_stated_rule(capsys):
    r = bench.main(["--quick", "--threads", "1"])
    assert {(s["pass"], s["axis"]) for s in r["sweeps"]} == \
        {(p, a) for p in bench.PASSES for a in ("n", "nt")}
    for s in r["sweeps"]:
        # Dense rules are timed only up to the stated size; the factored ones at every size.
        wanted = r["lengths"] if s["axis"] == "n" else \
            [x for x in r["nts"] if s["pass"] != "dense" or x <= r["dense_max_nt"]]
        assert s["sizes"] == wanted
        assert s["exponent_all"] == bench.fit_exponent(s["sizes"], s["fb_s"])
        half = len(s["sizes"]) // 2 if len(s["sizes"]) >= 4 else 0
        assert s["exponent_upper"] == bench.fit_exponent(s["sizes"][half:], s["fb_s"][half:])
        for t, g, ratio in zip(s["fb_s"], s["floor_gflop"], s["floor_ratio"]):
            assert (ratio is None) == (s["pass"] == "dense")
            if ratio is not None:
                assert ratio == pytest.approx(t / (g / r["matmul_gflops"]))
    out = capsys.readouterr().out
    assert "fitted exponent" in out and "upper half" in out and "wall time" in out


def test_best_time_reads_the_clock_it_is_given():
    # Reference: a fake clock that advances by a known step per reading; the minimum over
    # repeats of (end - start) is that step (the definition of the timer, no measurement).
    readings = iter(range(0, 1000, 3))
    calls = []
    best = bench.best_time(lambda: calls.append(1), 4, clock=lambda: next(readings))
    assert best == 3 and len(calls) == 5  # one warm-up call, then four timed ones
