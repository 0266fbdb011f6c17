"""`treewright validate` on every shipped config, training, refine and segment alike."""

from __future__ import annotations

from pathlib import Path

import pytest

from treewright.cli import main

CONFIGS = sorted((Path(__file__).resolve().parents[1] / "configs").glob("*.yaml"))


def _header_kind(path: Path) -> tuple[str, list[str]]:
    """The kind the config's own header command implies, and the overrides it says are added
    (benchmark rows get their data from the benchmark script)."""
    header = "".join(path.read_text(encoding="utf-8").splitlines(keepends=True)[:6])
    if f"treewright refine configs/{path.name}" in header:
        return "refine", []
    if f"treewright train configs/{path.name}" in header:
        return "train", []
    if f"treewright segment configs/{path.name}" in header:
        return "segment", []
    assert "bench_induction.py" in header and "adds data.train" in header, path.name
    return "train", ["data.train=train.txt"]


@pytest.mark.parametrize("path", CONFIGS, ids=[p.name for p in CONFIGS])
def test_every_shipped_config_validates_as_its_header_says(path, capsys):
    # Reference: the command in each file's header (common practice: every shipped config
    # starts with the exact command that runs it, and every one validates).
    kind, overrides = _header_kind(path)
    assert main(["validate", str(path), *overrides]) == 0
    out = capsys.readouterr().out
    assert f"valid {'training' if kind == 'train' else kind} config" in out


def test_options_lists_refine_options_too(capsys):
    # Reference: the schemas' own fields (RefineConfig.refine.cycles, TrainConfig.train.epochs).
    assert main(["validate", "--options"]) == 0
    out = capsys.readouterr().out
    assert "refine.cycles (int" in out and "train.epochs (int" in out
    assert "tree_form.factor" in out
    assert main(["validate", "--options", "--kind", "refine"]) == 0
    out = capsys.readouterr().out
    assert "refine.cycles (int" in out and "train.epochs" not in out


def test_refine_problems_are_reported_with_their_keys(tmp_path, capsys):
    path = tmp_path / "r.yaml"
    path.write_text("data:\n  start: text\n  train: t.txt\nrefine:\n  cycles: -1\n")
    assert main(["validate", str(path)]) == 1
    # Hand-checked: cycles has range [0, inf).
    assert "refine.cycles" in capsys.readouterr().err
    path.write_text("data:\n  start: text\n  train: t.txt\n")
    assert main(["validate", str(path)]) == 1
    # Hand-checked: the text start refines a given grammar (RefineDataConfig.grammar).
    assert "data.grammar" in capsys.readouterr().err


def test_paths_that_name_nothing_are_noted_and_do_not_fail(tmp_path, capsys):
    # Reference: the file system itself (one path exists, the other was never made).
    present = tmp_path / "train.txt"
    present.write_text("ta ferro kip\n", encoding="utf-8")
    missing = tmp_path / "dev.txt"
    config = CONFIGS[0].parent / "em_demo.yaml"
    assert main(["validate", str(config), f"data.train={present}", f"data.dev={missing}"]) == 0
    err = capsys.readouterr().err
    assert f"note: data.dev: {missing} does not exist (yet)" in err
    assert "data.train" not in err and "output.run_dir" not in err   # the run makes its folder
