"""Treebank labels that end in the subcategory mark and a number are refused with file and line:
refinement names its own subcategories NAME·k, so such a label would read as one.

Reference: hand-made treebanks; the fact that `NP·2` is subcategory 2 of NP is the grammar
format's (README, "The grammar text format"), and `NP·x` or `NP·` are names of their own.
"""

from __future__ import annotations

import io

import pytest

from treewright.errors import InputError
from treewright.refine import load_refine_config, refine

GOOD = "(ROOT (S (NP (N tasko)) (VP (V selim) (NP (N dorva)))))"


def _refine(tmp_path, lines):
    path = tmp_path / "train.trees"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    cfg = load_refine_config(None, ["data.start=treebank", f"data.train={path}",
                                    f"data.dev={path}", "refine.cycles=1",
                                    "refine.em_iterations=1", "refine.smoothed_iterations=1",
                                    f"output.run_dir={tmp_path / 'run'}",
                                    "output.stdout_metrics=false", "output.parse_f1=false"])
    return refine(cfg, tmp_path / "run", stream=io.StringIO()), path


@pytest.mark.parametrize("bad", [
    "(ROOT (S (NP·2 (N tasko)) (VP (V selim) (NP (N dorva)))))",     # a phrase
    "(ROOT (S (NP (N·10 tasko)) (VP (V selim) (NP (N dorva)))))",    # a tag under a unary chain
    "(ROOT (S (NP (N tasko)) (VP (V selim) (NP (N dorva)) (ADV·1 ko))))",  # inside binarization
])
def test_a_label_that_reads_as_a_subcategory_is_refused(tmp_path, bad):
    with pytest.raises(InputError) as err:
        _refine(tmp_path, [GOOD, bad, GOOD])
    assert err.value.line == 2 and "train.trees" in str(err.value)
    assert "subcategory mark" in str(err.value)


def test_labels_with_the_dot_but_no_number_are_ordinary(tmp_path):
    result, _ = _refine(tmp_path, [GOOD, GOOD.replace("(V ", "(V·x "), GOOD])
    assert result.grammar_path.exists()
