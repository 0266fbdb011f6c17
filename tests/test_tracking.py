"""Tests for treewright.tracking: logger back ends, fan-out, and the progress display.

References: the json module reads metrics.jsonl back; TensorBoard's own event reader reads the
event files back; rates and ETAs are recomputed by plain arithmetic from a fake clock; compact
numbers are checked against the value they stand for (relative error of 4 significant digits).
"""

from __future__ import annotations

import io
import json
import math
import re
import subprocess
import sys
import textwrap

import pytest
import torch

from treewright.tracking import (JsonlLogger, MultiLogger, Progress, StdoutLogger,
                                 TensorBoardLogger, format_duration, format_number,
                                 open_loggers)


class FakeClock:
    def __init__(self, start: float = 1000.0):
        self.now = start

    def __call__(self) -> float:
        return self.now


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def strict_json(line: str):
    """json.loads that refuses the non-standard NaN / Infinity tokens (RFC 8259 has none)."""
    def refuse(token):
        raise ValueError(f"non-standard JSON token {token}")

    return json.loads(line, parse_constant=refuse)


# --- number formatting --------------------------------------------------------------------


@pytest.mark.parametrize("value, text", [
    (math.pi, "3.142"), (0.001234567, "0.001235"), (23456.78, "23456.8"),
    (1.23456e-05, "1.235e-05"), (2.5e12, "2.500e+12"), (-0.5, "-0.5"), (0.0, "0"),
    (5000, "5000"), (12345678901, "12345678901"),
])
def test_format_number_is_compact_and_close(value, text):
    assert format_number(value) == text
    # Whatever the form, the text stands for the value to four significant digits.
    assert float(text) == pytest.approx(value, rel=5e-4, abs=0)


def test_format_number_non_finite():
    assert [format_number(v) for v in (math.nan, math.inf, -math.inf)] == ["nan", "inf", "-inf"]


def test_format_duration():
    # Arithmetic: 3661 s = 1 h 1 min 1 s.
    assert format_duration(25) == "0:00:25"
    assert format_duration(3661) == "1:01:01"
    assert format_duration(59.6) == "0:01:00"


# --- back ends ----------------------------------------------------------------------------


def test_stdout_logger_writes_one_readable_line_per_call():
    stream = io.StringIO()
    logger = StdoutLogger(stream, prefix="[velmar] ")
    metrics = {"train/loss": 3.14159, "lr": 1e-3, "sentences": 5000,
               "ppl": torch.tensor(23456.78, dtype=torch.float64)}
    logger.log(metrics, step=120)
    logger.log({"train/loss": 2.5}, step=121)
    lines = stream.getvalue().splitlines()
    assert lines == ["[velmar] step 120: train/loss 3.142, lr 0.001, sentences 5000, "
                     "ppl 23456.8", "[velmar] step 121: train/loss 2.5"]


def test_jsonl_logger_round_trips_through_json(tmp_path):
    path = tmp_path / "metrics.jsonl"
    clock = FakeClock(1_700_000_000.25)
    with JsonlLogger(path, clock=clock) as logger:
        logger.log({"loss": 3.14159, "sentences": 5000}, step=1)
        clock.now += 2.5
        logger.log({"loss": math.nan, "grad_norm": math.inf, "ppl": torch.tensor(7.5)}, step=2)
    records = [strict_json(line) for line in path.read_text().splitlines()]
    assert records == [
        {"step": 1, "time": 1_700_000_000.25, "loss": 3.14159, "sentences": 5000},
        {"step": 2, "time": 1_700_000_002.75, "loss": "nan", "grad_norm": "inf", "ppl": 7.5}]


def test_jsonl_logger_is_flushed_every_line_so_a_killed_run_keeps_them(tmp_path):
    path = tmp_path / "metrics.jsonl"
    # A child process logs three lines and then kills itself without closing anything.
    script = textwrap.dedent(f"""
        import os, signal
        from treewright.tracking import JsonlLogger
        logger = JsonlLogger({str(path)!r})
        for step in range(3):
            logger.log({{"loss": 1.0 / (step + 1)}}, step=step)
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    result = subprocess.run([sys.executable, "-c", script], capture_output=True, timeout=60)
    assert result.returncode == -9, result.stderr.decode()
    records = [json.loads(line) for line in path.read_text().splitlines()]
    assert [(r["step"], r["loss"]) for r in records] == [(0, 1.0), (1, 0.5), (2, 1 / 3)]


def test_jsonl_append_continues_and_ends_a_partial_line(tmp_path):
    path = tmp_path / "metrics.jsonl"
    path.write_text('{"step": 0, "time": 1.0, "loss": 9.0}\n{"step": 1, "ti')  # killed mid-line
    with JsonlLogger(path, clock=FakeClock(5.0)) as logger:
        logger.log({"loss": 4.0}, step=2)
    lines = path.read_text().splitlines()
    assert json.loads(lines[0])["loss"] == 9.0
    assert lines[1] == '{"step": 1, "ti'                       # kept, on its own line
    assert json.loads(lines[2]) == {"step": 2, "time": 5.0, "loss": 4.0}
    with JsonlLogger(path, append=False, clock=FakeClock(6.0)) as logger:
        logger.log({"loss": 1.0}, step=0)
    assert [json.loads(l) for l in path.read_text().splitlines()] == [
        {"step": 0, "time": 6.0, "loss": 1.0}]


def test_bad_metrics_are_refused(tmp_path):
    logger = JsonlLogger(tmp_path / "m.jsonl")
    with pytest.raises(ValueError):
        logger.log({"step": 1.0}, step=0)                      # reserved name
    with pytest.raises(TypeError):
        logger.log({"loss": "low"}, step=0)
    with pytest.raises(TypeError):
        logger.log({"converged": True}, step=0)
    with pytest.raises(ValueError):
        logger.log({"loss": 1.0}, step=-1)
    with pytest.raises((ValueError, RuntimeError)):
        logger.log({"loss": torch.ones(2)}, step=0)            # not a scalar
    logger.close()
    assert (tmp_path / "m.jsonl").read_text() == ""


def test_tensorboard_logger_writes_scalars_tensorboard_can_read(tmp_path):
    # Reference: TensorBoard's own event-file reader.
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    with TensorBoardLogger(tmp_path / "tb") as logger:
        logger.log({"train/loss": 3.5, "lr": 0.01}, step=10)
        logger.log({"train/loss": 2.25}, step=20)
    events = EventAccumulator(str(tmp_path / "tb"))
    events.Reload()
    assert sorted(events.Tags()["scalars"]) == ["lr", "train/loss"]
    assert [(e.step, e.value) for e in events.Scalars("train/loss")] == [(10, 3.5), (20, 2.25)]
    assert [e.step for e in events.Scalars("lr")] == [10]
    assert events.Scalars("lr")[0].value == pytest.approx(0.01, rel=1e-7)  # stored as float32


class Recorder:
    def __init__(self, fail_on_close: bool = False):
        self.calls, self.closed, self.fail_on_close = [], False, fail_on_close

    def log(self, metrics, step):
        self.calls.append((dict(metrics), step))

    def close(self):
        self.closed = True
        if self.fail_on_close:
            raise OSError("disk went away")


def test_multi_logger_fans_out_and_closes_all_even_after_a_failure():
    first, second, third = Recorder(fail_on_close=True), Recorder(), Recorder()
    multi = MultiLogger([first, second, third])
    multi.log({"loss": 1.0}, step=3)
    assert first.calls == second.calls == third.calls == [({"loss": 1.0}, 3)]
    with pytest.raises(OSError, match="disk went away"):
        multi.close()
    assert (first.closed, second.closed, third.closed) == (True, True, True)


def test_open_loggers_builds_the_run_folder_set(tmp_path):
    stream = io.StringIO()
    with open_loggers(tmp_path / "run", ["stdout", "jsonl"], stream=stream) as logger:
        logger.log({"loss": 0.75}, step=4)
    assert stream.getvalue() == "step 4: loss 0.75\n"
    (record,) = [json.loads(l) for l in (tmp_path / "run" / "metrics.jsonl").read_text()
                 .splitlines()]
    assert (record["step"], record["loss"]) == (4, 0.75)
    with pytest.raises(ValueError, match="wandb"):
        open_loggers(tmp_path / "run", ["wandb"])


# --- progress -----------------------------------------------------------------------------


PLAIN_LINE = re.compile(r"dev: (\d+)/1000 sentences, ([\d.]+)/s, ETA (\d+):(\d\d):(\d\d)")


def test_progress_plain_lines_when_not_a_terminal():
    clock, stream = FakeClock(), io.StringIO()
    with Progress(1000, "dev", stream=stream, clock=clock) as progress:
        for _ in range(60):            # 60 updates of 7 sentences, 0.5 s apart: 30 s
            clock.now += 0.5
            progress.update(7)
    lines = stream.getvalue().splitlines()
    # Default interval for non-terminals: a line every 10 s, at 10 s, 20 s and 30 s, plus the
    # final one.
    assert len(lines) == 4
    for line, seconds in zip(lines[:3], (10, 20, 30)):
        match = PLAIN_LINE.fullmatch(line)
        assert match, line
        count = int(match.group(1))
        assert count == 7 * 2 * seconds                     # two updates per second
        rate = count / seconds
        assert float(match.group(2)) == round(rate, 1)
        h, m, s = map(int, match.group(3, 4, 5))
        assert h * 3600 + m * 60 + s == round((1000 - count) / rate)
    assert lines[3] == "dev: 420/1000 sentences, 14.0/s, done in 0:00:30"
    assert "\r" not in stream.getvalue()


def test_progress_bar_on_a_terminal():
    clock, stream = FakeClock(), Terminal()
    progress = Progress(200, "epoch 1", stream=stream, clock=clock, width=20)
    clock.now += 2.0
    progress.update(50)
    clock.now += 2.0
    progress.update(150)
    progress.close()
    progress.close()                   # closing twice draws nothing more
    frames = stream.getvalue().split("\r")[1:]
    assert len(frames) == 3
    # 50/200 = 25% of a 20-wide bar is 5 marks; 50 in 2 s is 25/s; 150 left at 25/s is 6 s.
    assert frames[0] == "epoch 1:  25% [#####...............] 50/200 sentences, 25.0/s, " \
                        "ETA 0:00:06"
    assert frames[1].startswith("epoch 1: 100% [####################] 200/200 sentences, "
                                "50.0/s, ETA 0:00:00")
    assert frames[2].rstrip("\n").rstrip() == (
        "epoch 1: 100% [####################] 200/200 sentences, 50.0/s, done in 0:00:04")
    assert stream.getvalue().endswith("\n")


def test_progress_with_unknown_total_has_no_eta():
    clock, stream = FakeClock(), io.StringIO()
    with Progress(None, "reading", stream=stream, unit="lines", interval=1.0,
                  clock=clock) as progress:
        clock.now += 1.0
        progress.update(30)
    assert stream.getvalue().splitlines() == ["reading: 30 lines, 30.0/s",
                                              "reading: 30 lines, 30.0/s, done in 0:00:01"]
