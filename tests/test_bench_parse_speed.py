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
        # The same rule on the process's CPU time.
        cpu = g["cpu_ratios"][decoder]
        assert cpu == g["cpu_seconds"]["train"] / g["cpu_seconds"][decoder]
        assert f"in CPU time {g['cpu_seconds'][decoder]:.2f} s, ratio {cpu:.3f}" in out


def test_a_grammar_file_and_trained_grammars_are_timed_too(tmp_path, capsys):
    # Reference: the grammar file's own sizes (a seeded test grammar, written here) and the
    # sentences of the text file given, counted here directly.
    sys.path.insert(0, str(REPO / "tests"))
    from _grammars import random_grammar
    g = random_grammar(3, 4, 5, seed=2,
                       names=(["S·0", "S·1", "X·0"], ["P·0", "P·1", "Q·0", "Q·1"]))
    path = tmp_path / "g.pcfg"
    path.write_text(g.to_text(), encoding="utf-8")
    text = tmp_path / "text.txt"
    text.write_text("w0 w1 w2\nw3 w4\n\nw1 w1 w0 w2\n", encoding="utf-8")
    r = bench.main(["--grammar", str(path), "--text", str(text), "--repeats", "1"])
    out = capsys.readouterr().out
    assert r["sentences"] == 3 and "3 sentences of at most 20 words (9 words)" in out
    [row] = r["grammars"]
    assert (row["nt"], row["t"]) == (3, 4) and f"grammar {path}" in out
    trained = bench.main(["--quick", "--em-epochs", "2"])
    assert "after 2 EM epochs" in capsys.readouterr().out
    assert [(x["nt"], x["t"]) for x in trained["grammars"]] == [(4, 6)]
