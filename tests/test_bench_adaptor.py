"""scripts/bench_adaptor.py: the corpus it promises, and a tiny run that says its 1,000-sweep
figure is extrapolated (no timing is asserted)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_adaptor",
                                               REPO / "scripts" / "bench_adaptor.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_adaptor"] = bench
_spec.loader.exec_module(bench)


def test_the_corpus_is_2000_utterances_of_up_to_30_characters():
    # The figure in the README is stated for this corpus (the script's docstring).
    sentences = bench.corpus()
    assert len(sentences) == 2000
    assert max(map(len, sentences)) == 30 and min(map(len, sentences)) >= 1
    assert bench.corpus() == sentences  # seeded: every run times the same text


def test_a_tiny_run_reports_extrapolated_figures(capsys):
    rates = bench.main(["--utterances", "20", "--warmup", "0", "--sweeps", "1",
                        "--repeat", "2"])
    out = capsys.readouterr().out
    assert len(rates) == 2 and all(r > 0 for r in rates)
    assert out.count("(extrapolated, not run)") == 2
    assert "20 utterances" in out
