"""The notebook example of the README runs as written: it is taken from the docstring of
`treewright.export` (the one copy) and executed, and what it prints is checked."""

from __future__ import annotations

import io
import math
import textwrap
from contextlib import redirect_stdout
from pathlib import Path

import pytest

import treewright.export

REPO = Path(__file__).resolve().parents[1]
MARKER = "(this exact code is run by tests/test_export_api.py):\n"


def test_notebook_example_runs_and_prints_the_textbook_numbers(monkeypatch):
    code = textwrap.dedent(treewright.export.__doc__.split(MARKER, 1)[1])
    monkeypatch.chdir(REPO)  # the example names src/treewright/data/examples/astronomers.pcfg relative to the repo
    out = io.StringIO()
    with redirect_stdout(out):
        exec(compile(code, "README example", "exec"), {})
    lines = out.getvalue().splitlines()
    # Manning & Schuetze (1999), ch. 11: P(astronomers saw stars with ears) = 0.0015876; the
    # short sentence has one tree, .1 * .7 * .18 = 0.0126 (by hand).
    first, second = (float(line.split()[0]) for line in lines[:2])
    assert first == pytest.approx(math.log(0.0015876), rel=1e-6)
    assert second == pytest.approx(math.log(0.0126), rel=1e-6)
    tree, logprob = lines[2].rsplit(" ", 1)
    # The more probable of the two textbook trees (0.0009072, NP attachment).
    assert tree == "(S (NP astronomers) (VP (V saw) (NP (NP stars) (PP (P with) (NP ears)))))"
    assert float(logprob) == pytest.approx(math.log(0.0009072))
    assert lines[3].rsplit(" ", 1)[0] == "(S (NP astronomers) (VP (V saw) (NP ears)))"
    # The binary rules below probability one, read off src/treewright/data/examples/astronomers.pcfg.
    assert sorted(lines[4:]) == ["NP -> NP PP 0.4", "VP -> V NP 0.7", "VP -> VP PP 0.3"]
