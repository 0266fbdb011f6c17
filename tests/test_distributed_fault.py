"""A worker that dies or hangs mid-run ends the whole job with its rank named, within the
configured timeout, and the last checkpoint resumes to the uninterrupted run's result.

Reference for the resumed result: an uninterrupted single-process run (LocalWorld) of the same
config, to 1e-6 in float64 (summation order differs between worker counts).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_distributed import ENV, _assert_same_run, _overrides
from treewright.train import load_train_config, train

TIMEOUT = 5          # distributed.timeout_seconds of these runs
pytestmark = pytest.mark.slow


def _children_by_rank(pid: int) -> dict[int, int]:
    """Worker pids (children of the launcher `pid`) by their RANK, read from /proc (Linux)."""
    out = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            ppid = int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1])
            environ = (entry / "environ").read_bytes().split(b"\0")
        except (OSError, IndexError, ValueError):
            continue
        if ppid == pid:
            for item in environ:
                if item.startswith(b"RANK="):
                    out[int(item[5:])] = int(entry.name)
    return out


def _start(tmp_path, run: str, epochs: int = 30, **extra
           ) -> tuple[subprocess.Popen, Path, list[str]]:
    overrides = _overrides(tmp_path, run, **{"train.epochs": epochs,
                                              "distributed.timeout_seconds": TIMEOUT, **extra})
    config = tmp_path / "config.yaml"
    config.write_text("{}\n")
    proc = subprocess.Popen([sys.executable, "-m", "treewright", "train", "--workers", "2",
                             str(config), *overrides], env=ENV, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    run_dir = tmp_path / run
    deadline = time.monotonic() + 120
    # Wait for the second checkpoint: the workers are then in the middle of the run.
    while time.monotonic() < deadline:
        metrics = run_dir / "metrics.jsonl"
        if (run_dir / "checkpoint.ckpt").exists() and metrics.exists() and \
                metrics.read_text().count("train/loglik_per_word") >= 2:
            break
        assert proc.poll() is None, proc.communicate()
        time.sleep(0.05)
    ranks = _children_by_rank(proc.pid)
    assert sorted(ranks) == [0, 1]
    return proc, run_dir, overrides


def _finish(tmp_path, run_dir: Path, overrides: list[str]) -> None:
    again = subprocess.run([sys.executable, "-m", "treewright", "train", "--resume",
                            str(run_dir), "--workers", "2"], env=ENV, capture_output=True,
                           text=True, timeout=600)
    assert again.returncode == 0, again.stderr
    cfg = load_train_config(None, [o for o in overrides if not o.startswith("output.run_dir")]
                            + [f"output.run_dir={tmp_path / 'whole'}"])
    train(cfg, tmp_path / "whole")
    _assert_same_run(tmp_path / "whole", run_dir)


def test_a_killed_worker_ends_the_job_naming_its_rank_and_the_run_resumes(tmp_path):
    proc, run_dir, overrides = _start(tmp_path, "killed")
    killed_at = time.monotonic()
    os.kill(_children_by_rank(proc.pid)[1], signal.SIGKILL)
    _, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 1
    # Within the configured timeout (plus start-up slack of the launcher's monitor).
    assert time.monotonic() - killed_at < TIMEOUT + 10
    assert "worker rank 1" in stderr and "SIGKILL" in stderr, stderr
    assert "--resume" in stderr
    _finish(tmp_path, run_dir, overrides)


def test_a_hung_worker_is_found_by_the_watchdog(tmp_path):
    # SIGSTOP: the process lives but answers nothing, so only the heartbeats can tell.
    proc, run_dir, overrides = _start(tmp_path, "hung")
    ranks = _children_by_rank(proc.pid)
    os.kill(ranks[1], signal.SIGSTOP)
    stopped_at = time.monotonic()
    try:
        deadline = time.monotonic() + 60
        while Path(f"/proc/{ranks[0]}").exists() and time.monotonic() < deadline:
            time.sleep(0.1)
        waited = time.monotonic() - stopped_at
    finally:
        os.kill(ranks[1], signal.SIGCONT)   # so it can take the launcher's SIGTERM
    _, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 1
    assert TIMEOUT <= waited < TIMEOUT + 10
    assert "rank 0: worker rank 1 has not been heard from for 5 s" in stderr, stderr
    _finish(tmp_path, run_dir, overrides)


EPOCHS = 200


def test_ctrl_c_stops_every_worker_after_the_same_step_with_a_checkpoint(tmp_path):
    # Ctrl-C reaches the launcher only (each worker runs in a session of its own); it must be
    # passed on, not end the workers mid-step. Exit status 130 for an interrupt: common practice
    # (128 + SIGINT's number 2).
    from treewright.safeio import load_checkpoint
    # Many epochs and no convergence test, so the run cannot end before the stop arrives.
    proc, run_dir, overrides = _start(tmp_path, "ctrl-c", epochs=EPOCHS, **{"train.tolerance": 0})
    proc.send_signal(signal.SIGINT)
    _, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 130, stderr
    assert "stop after this step" in stderr, stderr
    assert f"treewright train --resume {run_dir} --workers 2" in stderr
    assert "failed" not in stderr, stderr
    assert not (run_dir / "grammar.pcfg").exists()  # it stopped before the end
    # Nothing logged is lost: the checkpoint holds every epoch the metrics file shows.
    _, meta = load_checkpoint(run_dir / "checkpoint.ckpt")
    epochs_logged = (run_dir / "metrics.jsonl").read_text().count("train/loglik_per_word")
    assert meta["position"]["epoch"] == epochs_logged < EPOCHS
    # Resumed to the end, it gives the uninterrupted run's grammar (shorter, to save time).
    _finish(tmp_path, run_dir, overrides)
