"""`fit`: training from token lists in memory, against the file-based path on the same data."""

from __future__ import annotations

import json

import pytest

from test_train_fixtures import base_overrides, velmor, write_corpus
from treewright.errors import InputError
from treewright.grammar import load_grammar
from treewright.inference import generate
from treewright.train import fit, load_train_config, train


@pytest.mark.parametrize("method", ["em", "gradient"])
def test_fit_from_memory_gives_the_grammar_the_files_give(tmp_path, method):
    # Reference: `train` on the same sentences written to files, same config and seed; the
    # grammar files must be equal byte for byte, and the metrics equal but for the clock.
    train_path, dev_path = write_corpus(tmp_path / "data", train=60, dev=20)
    extra = {"train.method": method, "train.restarts": 2}
    if method == "gradient":
        extra["optimizer.lr"] = 0.05
    cfg = load_train_config(None, base_overrides(tmp_path / "files", train_path, dev_path,
                                                 **extra))
    trainer = train(cfg, tmp_path / "files" / "run")
    trees = generate(velmor(), 80, seed=1)         # the sentences write_corpus wrote
    sentences = [t.leaves() for t in trees[:60]]
    assert [" ".join(s) for s in sentences] == train_path.read_text().splitlines()
    fitted = fit(sentences, cfg, dev_trees=trees[60:], run_dir=tmp_path / "memory")
    assert (tmp_path / "memory" / "grammar.pcfg").read_bytes() == \
        trainer.grammar_path_.read_bytes()
    assert fitted.grammar.to_text() == load_grammar(trainer.grammar_path_).to_text()
    assert fitted.result.best_restart == trainer.best_restart_

    def metrics(run):
        return [{k: v for k, v in json.loads(line).items()
                 if k not in ("time", "sentences_per_second")}
                for line in (run / "metrics.jsonl").read_text().splitlines()]

    assert metrics(tmp_path / "memory") == metrics(trainer.run_dir)
    # Without a run folder, fit still returns the grammar (its folder was a temporary one).
    again = fit(sentences, cfg, dev_trees=trees[60:])
    assert again.grammar.to_text() == fitted.grammar.to_text()


def test_fit_refuses_tokens_a_line_cannot_hold(tmp_path):
    cfg = load_train_config(None, base_overrides(tmp_path, tmp_path / "unused.txt", None))
    with pytest.raises(InputError, match=r"sentences\[1\]"):
        fit([["ka", "lu"], ["ka lu"]], cfg)
    with pytest.raises(InputError, match=r"sentences\[0\]"):
        fit([[]], cfg)
