"""Setting up a training run, before its first update: the run folder opened fresh or from its
checkpoint (`open_run`, `Position`); the data, the dev evaluator, the symbols and any
warm-start grammar (`prepare`, `Symbols`) with the notes that say what will be trained; the
baselines logged once (`baselines`, `budget_note`); and each restart's model (`new_model`).
`train.loop.Trainer` calls these in that order.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import torch

from treewright.config import dump_config_yaml
from treewright.errors import InputError
from treewright.grammar import Grammar, load_grammar
from treewright.params import PARAMETERIZATIONS, RuleModel, symbol_names, tabular_from_grammar
from treewright.runfolder import RunFolder
from treewright.safeio import load_checkpoint
from treewright.tracking import open_loggers
from treewright.train.config import TrainConfig, train_config_from_dict
from treewright.train.curriculum import restart_seed
from treewright.train.data import MemoryBudget, TrainData, load_data
from treewright.train.dev import DevLikelihood
from treewright.train.distributed import StreamedCorpus
from treewright.train.metrics import unigram_logprobs
from treewright.vocab import Vocabulary

CHECKPOINT_VERSION = 1


@dataclass
class Position:
    """Where the run is: the next (restart, epoch, batch) to run, and what has accumulated."""
    restart: int = 0
    epoch: int = 0
    batch: int = 0
    step: int = 0                    # updates over the whole run (the metrics' x axis)
    restart_step: int = 0            # updates within this restart (online EM's t)
    epoch_sums: dict = field(default_factory=lambda: {"loglik": 0.0, "words": 0,
                                                       "sentences": 0, "unparsed": 0,
                                                       "kl": 0.0})
    previous_objective: float | None = None
    finished: list = field(default_factory=list)   # per finished restart: scores, grammar file
    metrics_bytes: int = 0

    def to_meta(self) -> dict:
        return dict(self.__dict__)

    @classmethod
    def from_meta(cls, meta: dict) -> "Position":
        return cls(**meta)

    def count(self, tally: dict, k: int) -> None:
        """Update `k` of the epoch ran; `tally` (log-likelihood, words, ...) joins the sums."""
        for key, value in tally.items():
            self.epoch_sums[key] = self.epoch_sums.get(key, 0) + value
        self.step += 1
        self.restart_step += 1
        self.batch = k + 1

    def next_epoch(self, epoch: int) -> None:
        self.epoch = epoch
        self.batch = 0
        self.epoch_sums = Position().epoch_sums

    def next_restart(self, restart: int) -> None:
        self.restart = restart
        self.epoch = self.batch = self.restart_step = 0
        self.previous_objective = None


def open_run(folder: RunFolder, cfg: TrainConfig, resume: bool, config_source: str | None,
             is_main: bool) -> tuple[Position, dict[str, torch.Tensor]]:
    """Start the run folder (fresh: write the resolved config; resume: its checkpoint must be
    there); the position to start from and the checkpoint's tensors (none for a fresh run)."""
    config_text = dump_config_yaml(
        cfg, header=f"Resolved training config"
        f"{' from ' + config_source if config_source else ''}"
        f"; every option, defaults included.") if is_main else None
    folder.start(resume, config_text)
    if not resume:
        return Position(), {}
    tensors, meta = load_checkpoint(folder.checkpoint)
    if meta.get("version") != CHECKPOINT_VERSION:
        raise InputError(f"checkpoint version {meta.get('version')} is not "
                         f"{CHECKPOINT_VERSION}", path=str(folder.checkpoint))
    position = Position.from_meta(meta["position"])
    if is_main:
        # Metrics logged after the checkpoint belong to steps that will run again.
        folder.truncate_metrics(position.metrics_bytes)
    return position, tensors


def saved_config(run_dir: str | Path) -> TrainConfig:
    """The config stored in the checkpoint of the run in `run_dir`."""
    ckpt = RunFolder(run_dir, "train").checkpoint
    _, meta = load_checkpoint(ckpt)
    return train_config_from_dict(meta["config"], str(ckpt))


@dataclass
class Symbols:
    """The grammar's symbol names, and the warm-start grammar they come from (if any)."""
    nonterminals: list[str]
    preterminals: list[str]
    warm: Grammar | None = None

    @classmethod
    def of(cls, cfg: TrainConfig) -> "Symbols":
        if cfg.model.warm_start is not None:
            warm = load_grammar(cfg.model.warm_start, renormalize=True)
            return cls(list(warm.nonterminals), list(warm.preterminals), warm)
        return cls(*symbol_names(cfg.model.nonterminals, cfg.model.preterminals))

    @property
    def start(self) -> str:
        return self.warm.start if self.warm is not None else "ROOT"


def prepare(cfg: TrainConfig, data: TrainData | None, dev, budget: MemoryBudget,
            dtype: torch.dtype, position: Position, resume: bool
            ) -> tuple[TrainData, object, Symbols, list[str]]:
    """The data (read from `cfg.data` unless given), the dev evaluator (the dev likelihood
    unless given), the symbols, and the notes that open the log: where a resumed run goes on,
    or what a fresh run trains and what reading the data found."""
    data = load_data(cfg) if data is None else data
    if dev is None:
        dev = DevLikelihood(data, cfg.train.batch_size, budget, dtype)
    symbols = Symbols.of(cfg)
    if resume:
        return data, dev, symbols, [f"resuming at restart {position.restart}, epoch "
                                    f"{position.epoch}, batch {position.batch}"]
    return data, dev, symbols, [
        f"treewright train: method {cfg.train.method}, {cfg.model.parameterization} "
        f"parameters, {len(symbols.nonterminals)} nonterminals, "
        f"{len(symbols.preterminals)} preterminals, vocabulary {len(data.vocab)}", *data.notes]


def run_loggers(folder: RunFolder, cfg: TrainConfig, is_main: bool):
    """The metric loggers (metrics.jsonl, TensorBoard) and the headline printer on standard
    output; only rank 0 of a worker group writes."""
    return (folder.open_loggers(False, cfg.output.tensorboard, enabled=is_main),
            open_loggers(folder.path, ["stdout"] if cfg.output.stdout_metrics and is_main
                         else []))


def baselines(data: TrainData, dev) -> tuple[dict, list[str]]:
    """The unigram model's dev likelihood and the dev evaluator's reference systems (with their
    notes), logged once so that every dev figure printed later can be read beside them; empty
    without a dev set."""
    if not data.dev_ids:
        return {}, []
    baseline = unigram_logprobs(data.train_ids, data.dev_ids, len(data.vocab))
    words = sum(map(len, data.dev_ids))
    metrics = {"baseline/unigram_dev_loglik_per_word": sum(baseline) / words}
    more, notes = dev.baselines()
    metrics.update(more)
    return metrics, notes


def budget_note(cfg: TrainConfig, budget: MemoryBudget, data: TrainData) -> str | None:
    """What the memory budget sets aside (None without a budget, or on a streamed corpus)."""
    if budget.max_bytes is None or isinstance(data.train_ids, StreamedCorpus):
        return None
    over = [i for i, s in enumerate(data.train_ids) if len(s) > budget.max_length]
    return (f"memory budget {cfg.train.memory_budget_mb} MB: sentences of up to "
            f"{budget.max_length} words fit; {len(over)} longer training sentences set aside"
            + (f" (first at index {over[0]})" if over else ""))


def new_model(cfg: TrainConfig, symbols: Symbols, vocab: Vocabulary, restart: int,
              dtype: torch.dtype) -> RuleModel:
    """Restart `restart`'s model: the warm-start grammar, or the parameterization's random
    start, seeded by (seed, restart)."""
    m = cfg.model
    if symbols.warm is not None:
        return tabular_from_grammar(symbols.warm, vocab, m.warm_start_mix, dtype=dtype,
                                    source=str(m.warm_start))
    gen = torch.Generator().manual_seed(restart_seed(cfg.train.seed, restart))
    return PARAMETERIZATIONS[m.parameterization].from_options(m, len(vocab), gen, dtype)


def restore(model: RuleModel, method, tensors: dict[str, torch.Tensor]) -> None:
    """The checkpoint's model parameters ("model." keys) and the method's tensors."""
    model.load_state_dict({k[6:]: v for k, v in tensors.items() if k.startswith("model.")})
    method.load_state(tensors)
