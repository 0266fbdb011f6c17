"""Interrupted training runs: SIGKILL at seeded random moments and Ctrl-C (SIGINT), each followed
by `treewright train --resume`, on a tiny float64 corpus in subprocesses.

Reference for every check: the same config run once without interruption in a subprocess; its
grammar.pcfg bytes are what every interrupted-and-resumed run must end with (the loop's
documented float64 exactness). Between kills, every checkpoint and grammar file on disk must
load: `load_checkpoint` verifies the SHA-256 of the checkpoint, `load_grammar` the checksum line
of a saved grammar, so a half-written file would be refused.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_train_fixtures import write_corpus
from treewright.grammar import load_grammar
from treewright.safeio import load_checkpoint

# Gradient training: many small steps, a checkpoint after each one, two restarts, so a kill can
# land before the first checkpoint, mid-epoch, between restarts or while the result is written.
CONFIG = """\
data:
  train: {train}
  max_length: 12
model: {{nonterminals: 3, preterminals: 4}}
train: {{method: gradient, epochs: 4, batch_size: 4, dtype: float64, restarts: 2, seed: 3}}
optimizer: {{lr: 0.05}}
output:
  run_dir: {run}
  checkpoint_every_steps: 1
  progress: false
  stdout_metrics: false
  tensorboard: false
"""


def _setup(tmp_path: Path, name: str) -> tuple[Path, Path]:
    train, _ = write_corpus(tmp_path / "data", train=40, dev=1)
    run = tmp_path / name
    config = tmp_path / f"{name}.yaml"
    config.write_text(CONFIG.format(train=train, run=run))
    return config, run


def _command(*args: str) -> list[str]:
    return [sys.executable, "-m", "treewright", "train", *args]


def _env() -> dict:
    # One thread per process: the machine is shared, and it keeps the runs' arithmetic the same.
    return {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def _reference(tmp_path: Path) -> tuple[bytes, float]:
    config, run = _setup(tmp_path, "whole")
    started = time.monotonic()
    subprocess.run(_command(str(config)), check=True, env=_env(), capture_output=True)
    return (run / "grammar.pcfg").read_bytes(), time.monotonic() - started


def _check_files_whole(run: Path) -> None:
    """Every checkpoint and grammar on disk loads (InputError would name a damaged file)."""
    if (run / "checkpoint.ckpt").exists():
        load_checkpoint(run / "checkpoint.ckpt")
    for grammar in run.glob("*.pcfg"):
        load_grammar(grammar)


def _killed_then_resumed(tmp_path: Path, name: str, delays: list[float]) -> tuple[bytes, int]:
    """Start the run, SIGKILL it after each delay in turn (restarting or resuming between
    kills), check the files after each kill, then resume to the end. Returns the final grammar
    and how many kills hit a process still running."""
    config, run = _setup(tmp_path, name)
    landed = 0
    for delay in delays:
        args = ("--resume", str(run)) if (run / "checkpoint.ckpt").exists() else (str(config),)
        proc = subprocess.Popen(_command(*args), env=_env(), stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        time.sleep(delay)
        landed += proc.poll() is None
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        _check_files_whole(run)
    if (run / "checkpoint.ckpt").exists():
        args = ("--resume", str(run))
    else:  # killed before the first checkpoint: nothing to resume, so start again
        args = (str(config),)
    subprocess.run(_command(*args), check=True, env=_env(), capture_output=True)
    _check_files_whole(run)
    return (run / "grammar.pcfg").read_bytes(), landed


def test_one_sigkill_then_resume_gives_the_uninterrupted_grammar(tmp_path):
    expected, duration = _reference(tmp_path)
    delay = random.Random(10).uniform(0.5, 0.9) * duration  # seeded: the same moment each run
    # The reference's duration stands for this run's. On a shared machine whose load fell
    # since the reference ran, the run can end before the kill: then the kill is tried again,
    # twice as soon, in a fresh folder (each attempt's grammar is checked all the same).
    for attempt in range(4):
        got, landed = _killed_then_resumed(tmp_path, f"cut{attempt}", [delay])
        assert got == expected
        if landed:
            break
        delay /= 2
    assert landed == 1


@pytest.mark.slow
def test_repeated_sigkills_then_resume_give_the_uninterrupted_grammar(tmp_path):
    expected, duration = _reference(tmp_path)
    rng = random.Random(2024)
    landed = 0
    for trial in range(5):
        kills = [rng.uniform(0.2, 1.0) * duration for _ in range(rng.randint(1, 3))]
        got, hit = _killed_then_resumed(tmp_path, f"cut{trial}", kills)
        assert got == expected, f"trial {trial}, kills after {kills} s"
        landed += hit
    print(f"kill-and-resume: 5 trials, {landed} kills of a running process, all identical")
    assert landed >= 1  # how many land depends on the machine's speed; each one is checked


def test_ctrl_c_stops_with_a_checkpoint_and_says_how_to_resume(tmp_path):
    expected, _ = _reference(tmp_path)
    config, run = _setup(tmp_path, "ctrl-c")
    proc = subprocess.Popen(_command(str(config)), env=_env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not (run / "checkpoint.ckpt").exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    assert proc.poll() is None, "the run finished before it could be interrupted"
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=120)
    # Exit status 130 for an interrupt: common practice (128 + SIGINT's number 2).
    assert proc.returncode == 130, err
    assert f"treewright train --resume {run}" in err
    assert not (run / "grammar.pcfg").exists()  # it stopped: no result yet
    _, meta = load_checkpoint(run / "checkpoint.ckpt")
    assert meta["position"]["step"] >= 1
    subprocess.run(_command("--resume", str(run)), check=True, env=_env(), capture_output=True)
    assert (run / "grammar.pcfg").read_bytes() == expected
