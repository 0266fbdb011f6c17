"""The run folder: the one place that knows the names of the files a training, refinement or
segmentation run writes, and the handling they share (fresh start or resume, the log, the saved
config, the metric loggers).

Layout (`kind` "train", "refine" or "segment" names the log and the checkpoint)::

    config.yaml          the resolved config (every option)
    train.log            what was read, set aside and decided, in words (refine.log)
    data_summary.json    what the data reader reported, as data (export reads it)
    metrics.jsonl        one JSON object per logged step
    tensorboard/         TensorBoard event files
    checkpoint.ckpt      the last checkpoint (refine.ckpt; segment: chains.json), written
                         atomically
    restart-<r>.pcfg     training: the final grammar of each finished restart
    coarse.pcfg          refinement: the unrefined start; cycle-<c>.pcfg after each cycle
    grammar.pcfg         the result
    result.json          training: per-restart scores and which restart was kept
    report.html          the HTML report (`treewright report`)
    segmentation.txt     segmentation: the words of each utterance, space-separated
    lexicon.tsv          segmentation: the cached words (characters, customers, tables)
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Any, Sequence, TextIO

from treewright.errors import InputError
from treewright.safeio import atomic_write_text, check_writable
from treewright.tracking import METRICS_FILE, TENSORBOARD_FOLDER, MultiLogger, open_loggers

CONFIG = "config.yaml"
DATA_SUMMARY = "data_summary.json"
METRICS = METRICS_FILE
TENSORBOARD = TENSORBOARD_FOLDER
GRAMMAR = "grammar.pcfg"
RESULT = "result.json"
REPORT = "report.html"
COARSE = "coarse.pcfg"
SEGMENTATION = "segmentation.txt"
LEXICON = "lexicon.tsv"
LOGS = {"train": "train.log", "refine": "refine.log", "segment": "segment.log"}
CHECKPOINTS = {"train": "checkpoint.ckpt", "refine": "refine.ckpt", "segment": "chains.json"}


class RunFolder:
    """One run folder of a training ("train"), refinement ("refine") or segmentation
    ("segment") run."""

    def __init__(self, path: str | Path, kind: str = "train"):
        if kind not in LOGS:
            raise ValueError(f"kind must be one of {sorted(LOGS)}, got {kind!r}")
        self.path = Path(path)
        self.kind = kind
        # Set by `truncate_metrics`: the first step a resumed run logs again, from which
        # TensorBoard drops the events the interrupted session wrote.
        self.purge_step: int | None = None

    # ---- names -------------------------------------------------------------------------------

    @property
    def config(self) -> Path:
        return self.path / CONFIG

    @property
    def log(self) -> Path:
        return self.path / LOGS[self.kind]

    @property
    def data_summary(self) -> Path:
        return self.path / DATA_SUMMARY

    @property
    def metrics(self) -> Path:
        return self.path / METRICS

    @property
    def tensorboard(self) -> Path:
        return self.path / TENSORBOARD

    @property
    def checkpoint(self) -> Path:
        return self.path / CHECKPOINTS[self.kind]

    @property
    def grammar(self) -> Path:
        return self.path / GRAMMAR

    @property
    def result(self) -> Path:
        return self.path / RESULT

    @property
    def report(self) -> Path:
        return self.path / REPORT

    @property
    def coarse(self) -> Path:
        return self.path / COARSE

    @property
    def segmentation(self) -> Path:
        return self.path / SEGMENTATION

    @property
    def lexicon(self) -> Path:
        return self.path / LEXICON

    def restart_grammar(self, restart: int) -> Path:
        return self.path / f"restart-{restart}.pcfg"

    def cycle_grammar(self, cycle: int) -> Path:
        return self.path / f"cycle-{cycle}.pcfg"

    def summary(self, stem: str, suffix: str) -> Path:
        """`stem` is "summary" (the result's) or "summary-<c>"; suffix ".txt" or ".json"."""
        return self.path / f"{stem}{suffix}"

    @property
    def _what(self) -> str:
        return "refinement checkpoint" if self.kind == "refine" else "checkpoint"

    # ---- shared handling -----------------------------------------------------------------------

    def start(self, resume: bool, config_text: str | None = None) -> None:
        """Make the folder ready: writable; a fresh run refuses a folder that holds a checkpoint
        (and writes `config_text` to config.yaml when given), a resumed one needs it."""
        if resume and not self.checkpoint.exists():
            # Checked before creating anything: a mistyped folder is not made.
            raise InputError(f"no {self._what} here ({self.checkpoint.name}; a run writes one "
                             "as it goes)", path=str(self.path))
        check_writable(self.path)  # creates the folder, or says why it cannot
        if resume:
            return
        if self.checkpoint.exists():
            raise InputError(f"the run folder already holds a {self._what}; continue it with "
                             "--resume or choose another output.run_dir", path=str(self.path))
        for kind in LOGS:   # another command's run, finished or not: its files stay its own
            name = next((n for n in (CHECKPOINTS[kind], LOGS[kind])
                         if (self.path / n).exists()), None)
            if kind != self.kind and name is not None:
                raise InputError(f"the run folder holds a {kind} run ({name}), whose config and "
                                 f"metrics a {self.kind} run would overwrite; choose another "
                                 "output.run_dir", path=str(self.path))
        if config_text is not None:
            atomic_write_text(self.config, config_text)

    def metrics_size(self) -> int:
        """Bytes of metrics.jsonl now (a checkpoint records it; see `truncate_metrics`)."""
        return self.metrics.stat().st_size if self.metrics.exists() else 0

    def truncate_metrics(self, size: int) -> None:
        """Drop the metric lines logged after a checkpoint: their steps will run again. The
        TensorBoard events of those steps are dropped too, when `open_loggers` opens the
        TensorBoard logger again (`purge_step`: one past the last kept line's step)."""
        kept = b""
        if self.metrics.exists():
            with open(self.metrics, "r+b") as f:
                f.truncate(size)
                f.seek(max(0, size - TAIL_BYTES))
                kept = f.read()
        self.purge_step = _last_step(kept) + 1

    def note(self, text: str, stream: TextIO | None = None) -> None:
        """Append one timestamped line to the log and echo `text` to `stream`."""
        with open(self.log, "a", encoding="utf-8") as f:
            f.write(f"{time.strftime('%Y-%m-%d %H:%M:%S')} {text}\n")
        if stream is not None:
            stream.write(text + "\n")
            stream.flush()

    def write_data_summary(self, summary: dict[str, Any]) -> None:
        atomic_write_text(self.data_summary,
                          json.dumps(summary, indent=2, ensure_ascii=False) + "\n")

    def open_loggers(self, stdout: bool, tensorboard: bool, stream: TextIO | None = None,
                     enabled: bool = True) -> MultiLogger:
        """metrics.jsonl always, TensorBoard and `stream` when asked; none at all when not
        `enabled` (workers other than rank 0 write nothing)."""
        if not enabled:
            return MultiLogger([])
        backends: Sequence[str] = (["stdout"] if stdout else []) + ["jsonl"] + \
            (["tensorboard"] if tensorboard else [])
        return open_loggers(self.path, backends, stream, purge_step=self.purge_step)


TAIL_BYTES = 1 << 16  # read back from the end of metrics.jsonl to find its last line


def _last_step(text: bytes) -> int:
    """The "step" of the last complete metric line of `text` (the end of metrics.jsonl), -1
    when it holds none."""
    for line in reversed(text.split(b"\n")):
        try:
            step = json.loads(line).get("step")
        except (ValueError, AttributeError):
            continue   # empty, cut off by the seek, or not a metric line
        if isinstance(step, int):
            return step
    return -1
