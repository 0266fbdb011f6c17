"""scripts/bench_parse_speed.py: a quick run prints its header and one line per grammar and
decoder, with figures by the stated rules (no timing is asserted)."""

from __future__ import annotations

import importlib.util
import re
import sys
from pathlib import Path

import torch

from treewright.grammar import coarse_name

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_parse_speed",
                                               REPO / "scripts" / "bench_parse_speed.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_parse_speed"] = bench
_spec.loader.exec_module(bench)


def test_split_names_give_two_subcategories_per_coarse_symbol():
    # Reference: the script's docstring (S{i // 2}·{i % 2}), counted by hand for five symbols.
    names = bench.split_names("S", 5)
    assert names == ["S0\u00b70", "S0\u00b71", "S1\u00b70", "S1\u00b71", "S2\u00b70"]
    assert [coarse_name(x) for x in names] == ["S0", "S0", "S1", "S1", "S2"]
    # --unrefined: every symbol its own coarse symbol (the docstring's S{i}).
    plain = bench.plain_names("S", 3)
    assert plain == ["S0", "S1", "S2"] and [coarse_name(x) for x in plain] == plain


def test_a_quick_run_reports_its_figures_by_the_stated_rules(capsys):
    r = bench.main(["--quick", "--threads", "1"])
    out = capsys.readouterr().out
    # Reference: the demo training file read here directly, the first 12 lines of 1..8 words.
    lines = (REPO / "src/treewright/data/demo/train.txt").read_text(encoding="utf-8").splitlines()
    expected = [x.split() for x in lines if 0 < len(x.split()) <= 8][:12]
    assert r["sentences"] == len(expected) == 12
    assert f"{len(expected)} demo sentences of at most 8 words " \
           f"({sum(map(len, expected))} words)" in out
    assert f"torch {torch.__version__}" in out
    assert re.search(r"\d{4}-\d\d-\d\d \d\d:\d\d UTC", out)
    assert "load average " in out
    [g] = r["grammars"]
    assert (g["nt"], g["t"]) == (4, 6)
    assert "grammar 4/6: EM epoch" in out
    for name in ("train", "mbr", "max-rule-product"):
        assert g["rates"][name] == r["sentences"] / g["seconds"][name]
    for decoder in ("mbr", "max-rule-product"):
        ratio = g["ratios"][decoder]
        assert ratio == g["rates"][decoder] / g["rates"]["train"]
        assert re.search(rf"{decoder} .* ratio to training +{ratio:.3f} \(target >= 0.5\)", out)
