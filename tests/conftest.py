"""Fixtures shared by several test files."""

from __future__ import annotations

import pytest
import yaml

from test_train_fixtures import write_corpus
from treewright.cli import main


@pytest.fixture(scope="session")
def two_restart_run(tmp_path_factory):
    """A tiny float64 EM run with two restarts on sentences of the invented Velmor language,
    trained with data.lowercase (so parse must lowercase the input for every restart). Two
    epochs only, so that the restarts still disagree on some sentences."""
    folder = tmp_path_factory.mktemp("consensus")
    train, _ = write_corpus(folder / "data", train=40, dev=0)
    config = folder / "tiny.yaml"
    config.write_text(yaml.safe_dump({
        "data": {"train": str(train), "lowercase": True},
        "model": {"nonterminals": 3, "preterminals": 5},
        "train": {"epochs": 2, "restarts": 2, "dtype": "float64", "batch_size": 40},
        "output": {"run_dir": str(folder / "run"), "progress": False,
                   "stdout_metrics": False, "tensorboard": False}}))
    assert main(["train", str(config)]) == 0
    return folder / "run"
