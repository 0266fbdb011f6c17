"""Relative paths in a config file are read from the file's folder, so configs run anywhere."""

from __future__ import annotations

from pathlib import Path

import yaml

from treewright.cli import main
from treewright.config import load_config
from treewright.refine import load_refine_config
from treewright.train import load_train_config
from treewright.train.loop import saved_config

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "src" / "treewright" / "data" / "demo"


def test_shipped_configs_find_the_demo_corpus_from_another_folder(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    # Reference: the shipped corpus files on disk (their real location in the clone).
    cfg = load_train_config(ROOT / "configs" / "em_demo.yaml")
    assert cfg.data.train == DEMO / "train.txt" and cfg.data.train.is_file()
    assert cfg.data.dev == DEMO / "dev.trees"
    assert cfg.output.run_dir == ROOT / "runs" / "em_demo"
    refine = load_refine_config(ROOT / "configs" / "refine_demo_text.yaml")
    assert refine.data.train == DEMO / "train.txt" and refine.data.dev.is_file()
    # The text refinement reads what em_demo writes, wherever either command is run from.
    assert refine.data.grammar == ROOT / "runs" / "em_demo" / "grammar.pcfg"


def test_overrides_stay_relative_to_the_current_folder(tmp_path, monkeypatch):
    (tmp_path / "configs").mkdir()
    path = tmp_path / "configs" / "c.yaml"
    path.write_text("data:\n  train: ../corpora/a.txt\n  dev: /abs/dev.txt\n")
    monkeypatch.chdir(tmp_path / "configs")
    cfg = load_train_config(path.name, ["output.run_dir=out"])
    # Hand-checked: configs/../corpora/a.txt, an absolute path untouched, out in the cwd.
    assert cfg.data.train == tmp_path / "corpora" / "a.txt"
    assert cfg.data.dev == Path("/abs/dev.txt")
    assert cfg.output.run_dir == tmp_path / "configs" / "out"
    # The generic loader keeps paths as given unless asked (its round trips stay exact).
    from treewright.train import TrainConfig
    assert load_config(TrainConfig, path).data.train == Path("../corpora/a.txt")


def test_a_run_started_elsewhere_saves_absolute_paths_and_resumes_anywhere(tmp_path, monkeypatch):
    (tmp_path / "corpora").mkdir()
    (tmp_path / "configs").mkdir()
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "corpora" / "t.txt").write_text(
        "".join(f"vel ka {w} ro\nka {w} vel\n" for w in ("sim", "dor", "tal", "mek")))
    config = tmp_path / "configs" / "tiny.yaml"
    config.write_text(yaml.safe_dump({
        "data": {"train": "../corpora/t.txt"},
        "model": {"nonterminals": 2, "preterminals": 3},
        "train": {"epochs": 2, "dtype": "float64"},
        "output": {"run_dir": "../runs/tiny", "progress": False, "stdout_metrics": False,
                   "tensorboard": False}}))
    monkeypatch.chdir(tmp_path / "elsewhere")
    assert main(["train", str(config)]) == 0
    run = tmp_path / "runs" / "tiny"
    assert (run / "grammar.pcfg").is_file()
    saved = yaml.safe_load((run / "config.yaml").read_text())
    assert saved["data"]["train"] == str(tmp_path / "corpora" / "t.txt")
    monkeypatch.chdir(tmp_path)
    assert saved_config(run).data.train == tmp_path / "corpora" / "t.txt"
    # The saved config.yaml, read back as a config file, gives the same config.
    assert load_train_config(run / "config.yaml") == saved_config(run)
