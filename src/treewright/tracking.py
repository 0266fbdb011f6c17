"""Metrics logging and progress display for training runs.

A metrics logger is anything with `log(metrics, step)` and `close()` (`MetricLogger`). Back ends:
`StdoutLogger` (one readable line per call), `JsonlLogger` (`metrics.jsonl`, one JSON object per
line, flushed at once), `TensorBoardLogger` (scalars for TensorBoard) and `MultiLogger`, which
sends every call to several of them. `open_loggers` builds the usual set for a run folder.

`Progress` shows how far a long pass has got: a redrawn bar on a terminal, occasional plain
lines in a log file. `terminal_progress` shows the bar on a terminal and nothing elsewhere (for
commands whose standard error may be read by a program).
"""

from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Protocol, Sequence, TextIO

METRICS_FILE = "metrics.jsonl"
TENSORBOARD_FOLDER = "tensorboard"
BACKENDS = ("stdout", "jsonl", "tensorboard")


class MetricLogger(Protocol):
    """Receives named scalar metrics at a training step.

    `metrics` maps a name (for example "train/loss") to a number: int, float, or a one-element
    tensor or NumPy scalar. `step` is a non-negative int that grows over the run.
    """

    def log(self, metrics: Mapping[str, Any], step: int) -> None: ...

    def close(self) -> None: ...


class _ClosesOnExit:
    """Lets a logger be used in a `with` block that closes it."""

    def __enter__(self):
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()  # type: ignore[attr-defined]


def _scalars(metrics: Mapping[str, Any], step: int) -> dict[str, int | float]:
    """Check `step` and turn each metric into a Python int or float (tensors via .item())."""
    if isinstance(step, bool) or not isinstance(step, int) or step < 0:
        raise ValueError(f"step must be a non-negative int, not {step!r}")
    result: dict[str, int | float] = {}
    for name, value in metrics.items():
        if not isinstance(name, str) or not name:
            raise TypeError(f"metric names must be non-empty strings, not {name!r}")
        if hasattr(value, "item") and not isinstance(value, (int, float)):
            value = value.item()  # raises for a tensor with more than one element
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise TypeError(f"metric {name!r} must be a number, not {value!r}")
        result[name] = value
    return result


def perplexity(loglik_per_word: float) -> float:
    """exp(-log-likelihood per word) (common practice), inf where that overflows a float (a
    diverged model: below about -709 nats a word) rather than an OverflowError."""
    return math.exp(-loglik_per_word) if -loglik_per_word < 709.0 else math.inf


def format_number(value: int | float) -> str:
    """A compact, readable number: ints in full, floats to about four significant digits
    (3.142, 0.001235, 23456.8, 1.235e-05), and nan / inf / -inf as words."""
    if isinstance(value, int):
        return str(value)
    if math.isnan(value) or math.isinf(value):
        return str(value)
    magnitude = abs(value)
    if magnitude == 0:
        return "0"
    if 1e-3 <= magnitude < 1e4:
        return format(value, ".4g")
    if 1e4 <= magnitude < 1e9:
        # Large values such as perplexities read better whole than in exponent form.
        return format(value, ".1f")
    return format(value, ".3e")


class StdoutLogger(_ClosesOnExit):
    """One line per call: `step 120: loss 3.142, lr 0.001, sentences 5000`.

    stream: where lines go (default: sys.stdout at construction).
    prefix: put before every line, for example a run name.
    """

    def __init__(self, stream: TextIO | None = None, prefix: str = ""):
        self.stream = sys.stdout if stream is None else stream
        self.prefix = prefix

    def log(self, metrics: Mapping[str, Any], step: int) -> None:
        values = _scalars(metrics, step)
        parts = ", ".join(f"{name} {format_number(v)}" for name, v in values.items())
        self.stream.write(f"{self.prefix}step {step}: {parts}\n")
        self.stream.flush()

    def close(self) -> None:
        self.stream.flush()


class JsonlLogger(_ClosesOnExit):
    """Appends one JSON object per call to `path`: {"step": ..., "time": ..., metric: value}.

    "time" is wall-clock seconds since the epoch (from `clock`). Every line is written in one
    call and flushed, so a run that is killed loses at most the line being written. Infinite
    and NaN values are written as the strings "inf", "-inf" and "nan" so that every line is
    standard JSON. With `append` (the default) an existing file is continued, as on resuming
    a run; a partial last line left by a killed run is ended first so it cannot merge with new
    lines.
    """

    def __init__(self, path: str | Path, append: bool = True,
                 clock: Callable[[], float] = time.time):
        self.path = Path(path)
        self.clock = clock
        self.path.parent.mkdir(parents=True, exist_ok=True)
        needs_newline = (append and self.path.exists() and self.path.stat().st_size > 0
                         and not self.path.read_bytes().endswith(b"\n"))
        self.file = open(self.path, "a" if append else "w", encoding="utf-8", newline="\n")
        if needs_newline:
            self.file.write("\n")
            self.file.flush()

    def log(self, metrics: Mapping[str, Any], step: int) -> None:
        values = _scalars(metrics, step)
        for reserved in ("step", "time"):
            if reserved in values:
                raise ValueError(f"metric name {reserved!r} is reserved in {METRICS_FILE}")
        record: dict[str, Any] = {"step": step, "time": self.clock()}
        for name, value in values.items():
            record[name] = str(value) if isinstance(value, float) and not math.isfinite(value) \
                else value
        self.file.write(json.dumps(record, allow_nan=False) + "\n")
        self.file.flush()

    def close(self) -> None:
        if not self.file.closed:
            self.file.close()


class TensorBoardLogger(_ClosesOnExit):
    """Writes each metric as a TensorBoard scalar under its name, in `log_dir`.

    Events are flushed after every call, so TensorBoard shows a run as it goes.
    """

    def __init__(self, log_dir: str | Path, purge_step: int | None = None):
        # Imported here: TensorBoard support pulls in a large module that other back ends,
        # and most tests, never need.
        from torch.utils.tensorboard import SummaryWriter

        self.log_dir = Path(log_dir)
        # purge_step (a resumed run): TensorBoard drops the earlier sessions' events at this
        # step and later, which the resumed run logs again.
        self.writer = SummaryWriter(log_dir=str(self.log_dir), purge_step=purge_step)

    def log(self, metrics: Mapping[str, Any], step: int) -> None:
        for name, value in _scalars(metrics, step).items():
            self.writer.add_scalar(name, value, global_step=step)
        self.writer.flush()

    def close(self) -> None:
        self.writer.close()


class MultiLogger(_ClosesOnExit):
    """Sends every call to each of `loggers`, in order. `close` closes all of them even when
    one fails, then raises the first failure."""

    def __init__(self, loggers: Iterable[MetricLogger]):
        self.loggers = list(loggers)

    def log(self, metrics: Mapping[str, Any], step: int) -> None:
        for logger in self.loggers:
            logger.log(metrics, step)

    def close(self) -> None:
        first_failure: BaseException | None = None
        for logger in self.loggers:
            try:
                logger.close()
            except Exception as err:  # keep closing the others; report the first
                first_failure = first_failure or err
        if first_failure is not None:
            raise first_failure


def open_loggers(run_dir: str | Path, backends: Sequence[str] = ("stdout", "jsonl"),
                 stream: TextIO | None = None, purge_step: int | None = None) -> MultiLogger:
    """The loggers named in `backends` (any of BACKENDS) for a run folder: "jsonl" writes
    `run_dir/metrics.jsonl`, "tensorboard" writes under `run_dir/tensorboard` (from
    `purge_step` on, replacing what earlier sessions wrote there), "stdout" writes to `stream`
    (default sys.stdout)."""
    unknown = [b for b in backends if b not in BACKENDS]
    if unknown:
        raise ValueError(f"unknown logger back end(s) {unknown}; known: {', '.join(BACKENDS)}")
    run_dir = Path(run_dir)
    loggers: list[MetricLogger] = []
    for backend in dict.fromkeys(backends):  # each once, in the order given
        if backend == "stdout":
            loggers.append(StdoutLogger(stream))
        elif backend == "jsonl":
            loggers.append(JsonlLogger(run_dir / METRICS_FILE))
        else:
            loggers.append(TensorBoardLogger(run_dir / TENSORBOARD_FOLDER, purge_step))
    return MultiLogger(loggers)


def format_duration(seconds: float) -> str:
    """Seconds as h:mm:ss, rounded to the nearest second (`0:00:25`, `12:03:07`)."""
    total = int(round(max(seconds, 0.0)))
    hours, rest = divmod(total, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}"


class Progress:
    """Progress of a pass over `total` items (None when unknown).

    On a terminal (`stream.isatty()`), a bar is redrawn in place at most every `interval`
    seconds (default 0.1); otherwise a plain line is written at most every `interval` seconds
    (default 10), such as `dev: 120/1000 sentences, 35.2/s, ETA 0:00:25`. Closing writes a
    final line with the total time. Use as a context manager::

        with Progress(len(corpus), "epoch 3", unit="sentences") as progress:
            for batch in batches:
                ...
                progress.update(len(batch))

    stream: default sys.stderr, so progress never mixes with results on stdout.
    clock: a monotonic time source in seconds (replaceable in tests).
    """

    def __init__(self, total: int | None, desc: str = "", stream: TextIO | None = None,
                 unit: str = "sentences", interval: float | None = None,
                 clock: Callable[[], float] = time.monotonic, width: int = 30):
        if total is not None and total < 0:
            raise ValueError(f"total must be non-negative or None, not {total}")
        self.total = total
        self.desc = desc
        self.stream = sys.stderr if stream is None else stream
        self.unit = unit
        isatty = getattr(self.stream, "isatty", None)
        self.is_tty = bool(isatty and isatty())
        self.interval = interval if interval is not None else (0.1 if self.is_tty else 10.0)
        self.clock = clock
        self.width = width
        self.count = 0
        self.start = clock()
        self.last_shown = self.start
        self.drawn_length = 0
        self.closed = False

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def update(self, n: int = 1) -> None:
        """Count `n` more items done; redraw or write a line if `interval` has passed."""
        self.count += n
        now = self.clock()
        if now - self.last_shown >= self.interval:
            self.last_shown = now
            self._show(now, final=False)

    def close(self) -> None:
        """Show the final state (once)."""
        if self.closed:
            return
        self.closed = True
        self._show(self.clock(), final=True)

    def rate(self, now: float) -> float | None:
        """Items per second so far, or None before any time has passed."""
        elapsed = now - self.start
        return self.count / elapsed if elapsed > 0 else None

    def eta(self, now: float) -> float | None:
        """Seconds left at the current rate, or None when it cannot be known."""
        rate = self.rate(now)
        if self.total is None or not rate:
            return None
        return max(self.total - self.count, 0) / rate

    def describe(self, now: float, final: bool = False) -> str:
        """The plain status text: `desc: 120/1000 sentences, 35.2/s, ETA 0:00:25`."""
        return self._with_desc(self._status(now, final))

    def _status(self, now: float, final: bool) -> str:
        done = f"{self.count}/{self.total}" if self.total is not None else f"{self.count}"
        parts = [f"{done} {self.unit}"]
        rate = self.rate(now)
        if rate is not None:
            parts.append(f"{rate:.1f}/s")
        if final:
            parts.append(f"done in {format_duration(now - self.start)}")
        else:
            eta = self.eta(now)
            if eta is not None:
                parts.append(f"ETA {format_duration(eta)}")
        return ", ".join(parts)

    def _with_desc(self, text: str) -> str:
        return f"{self.desc}: {text}" if self.desc else text

    def _show(self, now: float, final: bool) -> None:
        if not self.is_tty:
            self.stream.write(self.describe(now, final) + "\n")
            self.stream.flush()
            return
        status = self._status(now, final)
        if self.total:
            fraction = min(self.count / self.total, 1.0)
            filled = int(round(fraction * self.width))
            status = f"{100 * fraction:3.0f}% [{'#' * filled}{'.' * (self.width - filled)}] " \
                     f"{status}"
        text = self._with_desc(status)
        # Pad with spaces so a shorter line fully covers the one drawn before it.
        padding = " " * max(self.drawn_length - len(text), 0)
        self.stream.write("\r" + text + padding + ("\n" if final else ""))
        self.stream.flush()
        self.drawn_length = len(text)


class SilentProgress:
    """A `Progress` that shows nothing (same methods)."""

    def __enter__(self) -> "SilentProgress":
        return self

    def __exit__(self, *exc_info: object) -> None:
        pass

    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def terminal_progress(total: int | None, desc: str = "", unit: str = "sentences",
                      stream: TextIO | None = None) -> "Progress | SilentProgress":
    """A `Progress` bar on `stream` (default sys.stderr) when it is a terminal, else a
    `SilentProgress`: a pipe or a file gets the results only."""
    stream = sys.stderr if stream is None else stream
    isatty = getattr(stream, "isatty", None)
    if isatty is not None and isatty():
        return Progress(total, desc, stream, unit)
    return SilentProgress()
