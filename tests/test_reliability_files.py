"""Files from strangers and disks that fail: nothing loaded runs code, sealed grammars refuse
edits, and a run folder that cannot be written is reported before training (or, mid-run,
without harming the last good checkpoint).

References: each malicious file carries a payload that would create a marker file if it ever
ran, so "refused" is checked both by the error and by the marker's absence. Resumed runs are
compared byte for byte with an uninterrupted run of the same float64 config (the loop's
documented exactness).
"""

from __future__ import annotations

import errno
import os
import pickle
import types
from pathlib import Path

import pytest
import torch

from test_train_fixtures import VELMOR, write_corpus
from treewright import safeio
from treewright.cli import main
from treewright.errors import InputError
from treewright.grammar import load_grammar, parse_grammar
from treewright.train import loop

CONFIG = """\
data: {{train: {train}, max_length: 12}}
model: {{nonterminals: 3, preterminals: 4}}
train: {{method: gradient, epochs: 2, batch_size: 8, dtype: float64, seed: 5}}
optimizer: {{lr: 0.05}}
output: {{run_dir: {run}, progress: false, stdout_metrics: false, tensorboard: false}}
"""


class _Payload:
    """Unpickling this runs os.system: the attack a pickle-based checkpoint would allow."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


def _config(tmp_path: Path, name: str) -> tuple[Path, Path]:
    train, _ = write_corpus(tmp_path / "data", train=24, dev=1)
    run = tmp_path / name
    path = tmp_path / f"{name}.yaml"
    path.write_text(CONFIG.format(train=train, run=run))
    return path, run


# ---- code in files is never run ----------------------------------------------------------

@pytest.mark.parametrize("kind", ["pickle", "torch.save"])
def test_resume_refuses_a_checkpoint_replaced_by_a_malicious_pickle(tmp_path, capsys, kind):
    config, run = _config(tmp_path, "run")
    assert main(["train", str(config)]) == 0
    marker = tmp_path / "pwned"
    ckpt = run / "checkpoint.ckpt"
    if kind == "pickle":
        ckpt.write_bytes(pickle.dumps(_Payload(marker)))
    else:
        torch.save({"model": _Payload(marker)}, ckpt)
    capsys.readouterr()
    assert main(["train", "--resume", str(run)]) == 1
    err = capsys.readouterr().err
    assert "not a treewright checkpoint" in err and str(ckpt) in err
    assert not marker.exists()


def test_a_yaml_config_with_a_python_object_tag_is_refused(tmp_path, capsys):
    marker = tmp_path / "pwned"
    config = tmp_path / "evil.yaml"
    config.write_text(f"data:\n  train: !!python/object/apply:os.system ['touch {marker}']\n")
    assert main(["train", str(config)]) == 1
    err = capsys.readouterr().err
    # PyYAML's safe loader knows no python/* tags (PyYAML documentation).
    assert str(config) in err and "line 2" in err and "python/object/apply" in err
    assert not marker.exists()
    assert main(["validate", str(config)]) == 1
    assert not marker.exists()


# ---- sealed grammar files ----------------------------------------------------------------

def test_a_saved_grammar_that_was_edited_or_truncated_is_refused(tmp_path):
    path = tmp_path / "g.pcfg"
    parse_grammar(VELMOR).save(path)
    text = path.read_text()
    assert text.startswith("@format 1\n") and text.splitlines()[-1].startswith(
        "# checksum sha256:")
    assert load_grammar(path).to_text() == text

    # Edited: one probability moved between two rules of D, still summing to one.
    path.write_text(text.replace('D -> "ta" 0.5', 'D -> "ta" 0.6').replace(
        'D -> "mo" 0.5', 'D -> "mo" 0.4'))
    with pytest.raises(InputError, match="edited or truncated") as info:
        load_grammar(path)
    assert info.value.line == len(text.splitlines())
    assert "delete its '# checksum' line" in str(info.value)

    # Truncated mid-file: the checksum line is gone but @format says treewright wrote it.
    path.write_text(text[: len(text) // 2])
    with pytest.raises(InputError, match="truncated"):
        load_grammar(path)

    # Accepting the edit as the message says: delete the checksum and @format lines.
    edited = [line for line in text.replace('"ta" 0.5', '"ta" 0.6').replace(
        '"mo" 0.5', '"mo" 0.4').splitlines() if not line.startswith(("# checksum", "@format"))]
    path.write_text("\n".join(edited) + "\n")
    accepted = load_grammar(path)
    d = accepted.symbols.index("D")
    assert float(accepted.lexical[d].exp().max()) == pytest.approx(0.6)


def test_line_endings_changed_by_an_editor_are_not_an_edit(tmp_path):
    path = tmp_path / "g.pcfg"
    text = parse_grammar(VELMOR).to_text()
    path.write_bytes(text.replace("\n", "\r\n").encode())
    assert load_grammar(path).to_text() == text


# ---- run folders that cannot be written ------------------------------------------------

def test_a_run_folder_that_cannot_be_created_is_reported_before_training(tmp_path, capsys):
    config, _ = _config(tmp_path, "x")
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    assert main(["train", str(config), f"output.run_dir={blocker}/run"]) == 1
    err = capsys.readouterr().err
    assert "cannot create the run folder" in err and str(blocker) in err


def test_a_nearly_full_disk_is_reported_before_training(tmp_path, capsys, monkeypatch):
    config, run = _config(tmp_path, "run")
    usage = types.SimpleNamespace(total=2**30, used=2**30 - 2**20, free=2**20)
    monkeypatch.setattr(safeio.shutil, "disk_usage", lambda folder: usage)
    assert main(["train", str(config)]) == 1
    assert "only 1.0 MiB free" in capsys.readouterr().err
    # Reported before any work: no log, no metrics, no checkpoint.
    assert sorted(p.name for p in run.iterdir()) == []


def test_a_disk_that_fills_mid_run_leaves_the_last_checkpoint_whole(tmp_path, capsys,
                                                                     monkeypatch):
    config, whole = _config(tmp_path, "whole")
    assert main(["train", str(config)]) == 0
    expected = (whole / "grammar.pcfg").read_bytes()

    config, run = _config(tmp_path, "full")
    failing = {"on": False}
    real_write = os.write

    def write(fd, data):
        if failing["on"]:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_write(fd, data)

    # Only safeio's writes fail (a stand-in os module there), as on a disk that just filled.
    monkeypatch.setattr(safeio, "os", types.SimpleNamespace(**{**vars(os), "write": write}))
    real_save = loop.save_checkpoint
    saves = {"n": 0, "before": None}

    def save(path, tensors, meta):
        saves["n"] += 1
        if saves["n"] == 2:  # the second checkpoint: the first is on disk
            saves["before"] = Path(path).read_bytes()
            failing["on"] = True
        return real_save(path, tensors, meta)

    monkeypatch.setattr(loop, "save_checkpoint", save)
    assert main(["train", str(config)]) == 1
    err = capsys.readouterr().err
    assert "No space left on device" in err and f"treewright train --resume {run}" in err
    assert (run / "checkpoint.ckpt").read_bytes() == saves["before"]
    assert not [p for p in run.iterdir() if p.name.endswith(".tmp")]

    monkeypatch.undo()
    assert main(["train", "--resume", str(run)]) == 0
    assert (run / "grammar.pcfg").read_bytes() == expected
