"""Run folders: a fresh run never writes over another command's run."""

from __future__ import annotations

import pytest

from treewright.errors import InputError
from treewright.runfolder import RunFolder


@pytest.mark.parametrize("kind,other,file", [("train", "segment", "chains.json"),
                                             ("segment", "train", "checkpoint.ckpt"),
                                             ("refine", "train", "checkpoint.ckpt"),
                                             ("train", "segment", "segment.log"),
                                             ("refine", "train", "train.log")])
def test_a_fresh_run_refuses_a_folder_of_another_commands_run(tmp_path, kind, other, file):
    # Common practice ("nothing lost"): a run folder that holds another command's run (its
    # checkpoint, or its log alone: a run stopped before its first checkpoint) keeps its
    # config.yaml, log and metrics; the refusal names the folder and what it holds, and writes
    # nothing.
    (tmp_path / file).write_text("{}")
    (tmp_path / "config.yaml").write_text("theirs\n")
    with pytest.raises(InputError, match=f"holds a {other} run \\({file}\\)") as err:
        RunFolder(tmp_path, kind).start(resume=False, config_text="ours\n")
    assert str(tmp_path) in str(err.value)
    assert (tmp_path / "config.yaml").read_text() == "theirs\n"
    fresh = tmp_path / "fresh"
    RunFolder(fresh, kind).start(resume=False, config_text="ours\n")
    assert (fresh / "config.yaml").read_text() == "ours\n"
