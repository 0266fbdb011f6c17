"""Resume and divergence: an interrupted float64 run, continued with resume, ends with the same
bits as an uninterrupted one; a NaN loss stops training and leaves the last checkpoint intact."""

from __future__ import annotations

import pytest
import torch

from test_train_fixtures import base_overrides, write_corpus
from treewright.cli import main
from treewright.safeio import load_checkpoint
from treewright.train import TrainingDiverged, Trainer, load_train_config, resume, train


def _cfg(tmp_path, run, with_dev=True, **extra):
    train_path, dev_path = write_corpus(tmp_path / "data", train=60, dev=20)
    dev_path = dev_path if with_dev else None
    values = {"train.epochs": 3, "train.batch_size": 16, "output.run_dir": tmp_path / run}
    values.update(extra)
    return load_train_config(None, base_overrides(tmp_path, train_path, dev_path, **values))


@pytest.mark.parametrize("extra,session", [
    ({"train.method": "gradient", "optimizer.lr": 0.05, "optimizer.schedule": "cosine",
      "optimizer.warmup_steps": 2, "train.restarts": 2}, 5),
    ({"train.method": "online_em"}, 4),
    ({"train.method": "vb", "prior.concentration": 0.5, "train.restarts": 2}, 2),
    ({"train.method": "gradient", "model.parameterization": "compound", "model.latent_dim": 3,
      "model.embedding_dim": 8, "optimizer.lr": 0.05}, 5),
], ids=["gradient", "online_em", "vb", "compound"])
def test_resumed_run_is_bit_identical_to_an_uninterrupted_one(tmp_path, extra, session):
    # Each session stops after `session` updates, mid-epoch for the minibatch methods and
    # across a restart boundary for gradient and vb.
    # Reference: the uninterrupted run itself; bitwise equality of the final grammar file and
    # of every tensor in the last checkpoint.
    whole = _cfg(tmp_path, "whole", **extra)
    train(whole, tmp_path / "whole")
    cut = _cfg(tmp_path, "cut", **extra)
    stops = 0
    finished = Trainer(cut, tmp_path / "cut").run(max_steps=session)
    while not finished:
        stops += 1
        _, finished = resume(tmp_path / "cut", max_steps=session)
    assert stops >= 2
    assert (tmp_path / "cut/grammar.pcfg").read_bytes() == \
        (tmp_path / "whole/grammar.pcfg").read_bytes()
    a, meta_a = load_checkpoint(tmp_path / "whole/checkpoint.ckpt")
    b, meta_b = load_checkpoint(tmp_path / "cut/checkpoint.ckpt")
    assert a.keys() == b.keys()
    for name in a:
        assert torch.equal(a[name], b[name]), name
    assert meta_a["position"]["finished"] == meta_b["position"]["finished"]


def test_nan_loss_stops_with_a_clear_message_and_keeps_the_checkpoint(tmp_path, monkeypatch):
    # No dev set, so every inside pass is a training step's.
    cfg = _cfg(tmp_path, "nan", with_dev=False, **{"train.method": "gradient", "optimizer.lr": 0.05,
                                   "output.checkpoint_every_steps": 2})
    from treewright import engine  # estep reads engine.log_partition at call time

    real = engine.log_partition
    calls = {"n": 0}

    def poisoned(*args, **kwargs):
        calls["n"] += 1
        out = real(*args, **kwargs)
        return out * float("nan") if calls["n"] == 3 else out

    monkeypatch.setattr(engine, "log_partition", poisoned)
    with pytest.raises(TrainingDiverged, match="NaN or infinite.*last good checkpoint"):
        train(cfg, tmp_path / "nan")
    ckpt = tmp_path / "nan/checkpoint.ckpt"
    tensors, meta = load_checkpoint(ckpt)  # still a valid checkpoint, from step 2
    assert meta["position"]["step"] == 2
    assert all(torch.isfinite(t).all() for k, t in tensors.items() if k.startswith("model."))
    assert "NaN" in (tmp_path / "nan/train.log").read_text()
    assert not (tmp_path / "nan/grammar.pcfg").exists()


@pytest.mark.parametrize("command", ["train", "refine"])
def test_the_command_line_refuses_a_config_it_would_ignore_on_resume(command, tmp_path, capsys):
    """--resume reads the config saved in the run folder, so a config file or overrides beside
    it would be silently ignored; both commands refuse them, and refuse to start with neither
    (common practice: a command does not drop arguments it was given)."""
    cfg = tmp_path / "c.yaml"
    cfg.write_text("data: {train: x.txt}\n", encoding="utf-8")
    for argv in ([command, "--resume", str(tmp_path), "--", "train.epochs=3"],
                 [command, str(cfg), "--resume", str(tmp_path)]):
        assert main(argv) == 1
        assert "takes the config saved in the run folder" in capsys.readouterr().err
    assert main([command]) == 1
    assert "give a config file (or --resume RUN)" in capsys.readouterr().err
