"""The training loop: one run folder, several restarts, one update method, one model.

A run reads top to bottom in `Trainer.run`: open the run folder (fresh or from its checkpoint);
log the baselines; for each restart build the model (`params.PARAMETERIZATIONS`) and the update
method (`train.methods.METHODS`), then run its epochs (`_run_restart`): each epoch is a list of
updates (one for the EM family, one per minibatch otherwise), after which the dev evaluator the
caller passed in scores the grammar, the metrics are logged and a checkpoint is written; the
restart's grammar is saved; at the end the restart with the best dev likelihood (else training
objective) becomes the result. The file names are those of `runfolder.RunFolder`.

Resuming reads the checkpoint and continues at the recorded position. Everything random is a
pure function of (seed, restart, epoch), so the position (restart, epoch, batch) plus the model's
parameters and the method's tensors is the whole state; in float64 a resumed run ends with the
same bits as one that was never interrupted.
"""

from __future__ import annotations

import json
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

import torch

from treewright.config import config_to_dict, dump_config_yaml
from treewright.errors import InputError
from treewright.grammar import load_grammar
from treewright.params import PARAMETERIZATIONS, RuleModel, symbol_names, tabular_from_grammar
from treewright.params.tabular import RuleTensors, keep_most_probable, rules_to_grammar
from treewright.runfolder import RunFolder
from treewright.safeio import atomic_write_bytes, atomic_write_text, load_checkpoint, \
    save_checkpoint
from treewright.tracking import Progress, open_loggers
from treewright.train.config import TrainConfig, train_config_from_dict
from treewright.train.curriculum import Curriculum, restart_seed
from treewright.train.data import MemoryBudget, TrainData, load_data, summary
from treewright.train.dev import DevLikelihood
from treewright.train.distributed import LocalWorld, StreamedCorpus, plan_sentences
from treewright.train.estep import Batch, DivergedError
from treewright.train.methods import METHODS, Step, Update
from treewright.train.metrics import rule_entropies, unigram_logprobs
from treewright.train.stopping import StopRequest

__all__ = ["Position", "RunResult", "Trainer", "TrainingDiverged", "load_data", "restart_seed",
           "saved_config"]

CHECKPOINT_VERSION = 1
# Headline numbers of each epoch, the ones printed on the terminal; the files get everything.
HEADLINE = ("restart", "epoch", "train/loglik_per_word", "train/perplexity",
            "train/elbo_per_word", "dev/loglik_per_word", "dev/perplexity", "dev/sentence_f1",
            "sentences_per_second")


class TrainingDiverged(RuntimeError):
    """Training met a NaN or infinite loss; the last good checkpoint is left as it was."""


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


@dataclass
class RunResult:
    """A finished run: the result grammar's file, the restart kept, and per-restart scores."""
    grammar_path: Path
    best_restart: int
    restarts: list = field(default_factory=list)


def _dtype(cfg: TrainConfig) -> torch.dtype:
    return torch.float64 if cfg.train.dtype == "float64" else torch.float32


class Trainer:
    """Trains `cfg` into `run_dir`. `run(max_steps)` may stop early (after `max_steps` updates
    of this session, with a checkpoint, returning None) and a new Trainer with `resume=True`
    continues. `data`: the training data when the caller has read them (default: the corpora of
    `cfg.data`). `dev`: the dev evaluator (default `train.dev.DevLikelihood`), called with a
    `params.Scorer` after each epoch; `treewright.induce` passes one that adds bracket F1.

    Fitted state after `run`: `best_restart_`, `results_` (per restart), `grammar_path_`.
    """

    def __init__(self, cfg: TrainConfig, run_dir: str | Path, resume: bool = False,
                 stream: TextIO | None = None, config_source: str | None = None,
                 world: LocalWorld | None = None, data: TrainData | None = None, dev=None):
        self.cfg = cfg
        # The data-parallel group (train.distributed); only its rank 0 writes the run folder.
        self.world = LocalWorld() if world is None else world
        self.folder = RunFolder(run_dir, "train")
        self.run_dir = self.folder.path
        self.resume = resume
        self.stream = sys.stderr if stream is None else stream
        self.config_source = config_source
        self.dtype = _dtype(cfg)
        self.budget = MemoryBudget(cfg, self.dtype)
        whole_epoch = METHODS[cfg.train.method].whole_epoch
        self.curriculum = Curriculum(cfg, self.budget, cfg.train.shuffle and not whole_epoch)
        self.data = data
        self.dev = dev
        self.epoch_ = 0  # the epoch being trained (the structural bias depends on it)
        self.stop = StopRequest(self.stream)
        self.session_steps = 0  # updates made in this session (for `max_steps`)

    # ---- the run, in the order it happens ---------------------------------------------------

    def run(self, max_steps: int | None = None) -> RunResult | None:
        """Train until done (returns the `RunResult`) or until `max_steps` updates ran in this
        session (returns None, after a checkpoint). Raises TrainingDiverged on NaN/inf."""
        position, tensors = self._open()
        self._prepare(position)
        self.loggers = self.folder.open_loggers(False, self.cfg.output.tensorboard,
                                                enabled=self.world.is_main)
        self.headline = open_loggers(self.run_dir, ["stdout"] if self.cfg.output.stdout_metrics
                                     and self.world.is_main else [])
        self.world.on_stop_request(self.stop.request)
        with self.stop, self.loggers, self.headline:
            if not self.resume:
                self._log_baselines()
            self._note_budget()
            for restart in range(position.restart, self.cfg.train.restarts):
                self.model = self._new_model(restart)
                self.method = METHODS[self.cfg.train.method](self.cfg, self.model)
                # A checkpoint taken between restarts holds the finished restart's state.
                if tensors and position.restart_step > 0:
                    self.model.load_state_dict({k[6:]: v for k, v in tensors.items()
                                                if k.startswith("model.")})
                    self.method.load_state(tensors)
                tensors = {}
                if not self._run_restart(restart, position, max_steps):
                    return None
                self._finish_restart(restart, position)
            return self._finish_run(position)

    def _run_restart(self, restart: int, position: Position, max_steps: int | None) -> bool:
        """The epochs of one restart; False when the session stops before its end."""
        cfg, method = self.cfg, self.method
        plans = [self.curriculum.epoch_plan(self.data.train_ids, restart, e)
                 for e in range(cfg.train.epochs)]
        total_steps = sum(map(len, plans))
        if position.restart_step == 0 and position.epoch == 0 and self.data.dev_ids:
            # The starting point, so every run shows what training gained over it.
            start = self.dev(self.model.scorer(method.rules()))
            self.loggers.log({"restart": restart, **{k.replace("dev/", "init/dev_"): v
                                                     for k, v in start.items()}}, position.step)
        while position.epoch < cfg.train.epochs:
            epoch = self.epoch_ = position.epoch
            plan = plans[epoch]
            updates = [plan] if method.whole_epoch else [[group] for group in plan]
            started = time.monotonic()
            progress = Progress(plan_sentences(plan), f"restart {restart} epoch {epoch}",
                                stream=self.stream) \
                if cfg.output.progress and self.world.is_main else None
            extra: dict = {}   # the epoch metrics of a whole-epoch method's single update
            try:
                for k in range(position.batch, len(updates)):
                    step = Step(updates[k], self._batch, self.data.train_ids,
                                cfg.train.batch_size, self.world, position.step,
                                position.restart_step, total_steps, progress)
                    update = self._guard(lambda: self._update(step), position)
                    self._count(update, position, k)
                    extra.update(update.epoch_metrics)
                    if k + 1 < len(updates) and not self._mid_epoch(position, max_steps):
                        return False
            finally:
                if progress is not None:
                    progress.close()
            metrics = epoch_metrics(position.epoch_sums)
            metrics.update(extra)
            metrics["sentences_per_second"] = plan_sentences(plan) / \
                max(time.monotonic() - started, 1e-9)
            metrics.update(self.dev(self.model.scorer(method.rules())))
            metrics.update(rule_entropies(method.rules().dense(), self.nonterminals,
                                          self.preterminals))
            cap = self.curriculum.length_cap(epoch)
            metrics.update({"restart": restart, "epoch": epoch,
                            "length_cap": cap if cap is not None else -1})
            self._log_epoch(metrics, position.step)
            converged = self._converged(epoch, metrics, position)
            position.epoch = cfg.train.epochs if converged else epoch + 1
            position.batch = 0
            position.epoch_sums = Position().epoch_sums
            self.checkpoint(position)
            if converged:
                self._note(f"restart {restart}: converged after epoch {epoch} (objective per "
                           f"word improved by less than {cfg.train.tolerance})")
            if self._stop_now(max_steps) and position.epoch < cfg.train.epochs:
                return False
        return True

    def _update(self, step: Step) -> Update:
        update = self.method.update(step)
        self._check_finite()
        return update

    def _count(self, update: Update, position: Position, k: int) -> None:
        """Add one update to the position and the epoch's sums; log its step line."""
        sums = position.epoch_sums
        for key, value in update.tally.items():
            sums[key] = sums.get(key, 0) + value
        position.step += 1
        position.restart_step += 1
        position.batch = k + 1
        self.session_steps += 1
        if update.step_metrics is not None and \
                position.step % self.cfg.output.log_every_steps == 0:
            tally = update.tally
            self.loggers.log({"step/loglik_per_word": tally["loglik"] / max(tally["words"], 1),
                              **update.step_metrics}, position.step)

    def _mid_epoch(self, position: Position, max_steps: int | None) -> bool:
        """Between two updates of an epoch: checkpoint when due or when stopping; False when
        the session stops here."""
        every = self.cfg.output.checkpoint_every_steps
        stop = self._stop_now(max_steps)
        if stop or (every is not None and position.step % every == 0):
            self.checkpoint(position)
        return not stop

    def _converged(self, epoch: int, metrics: dict, position: Position) -> bool:
        """Whether the objective improved by less than `train.tolerance` (methods that
        converge only); records the objective for the next epoch."""
        tolerance = self.cfg.train.tolerance
        objective = metrics.get("train/elbo_per_word", metrics.get(
            "train/log_posterior_per_word", metrics["train/loglik_per_word"]))
        # Only objectives of the same kind over the same sentences compare: VB's first epoch
        # reports a log-likelihood (no ELBO yet), and a curriculum step changes the data, so
        # neither counts as "improved by less than the tolerance".
        curriculum = self.curriculum
        comparable = (epoch >= self.method.first_comparable_epoch
                      and curriculum.same_data(epoch, epoch - 1)
                      and curriculum.length_cap(epoch + 1) == curriculum.length_cap(epoch))
        converged = (self.method.converges and tolerance > 0 and comparable
                     and position.previous_objective is not None
                     and objective - position.previous_objective < tolerance)
        position.previous_objective = objective
        return converged

    # ---- setting up -------------------------------------------------------------------------

    def _open(self) -> tuple[Position, dict[str, torch.Tensor]]:
        """The position to start from and the checkpoint's tensors (none for a fresh run)."""
        folder = self.folder
        config_text = dump_config_yaml(
            self.cfg, header=f"Resolved training config"
            f"{' from ' + self.config_source if self.config_source else ''}"
            f"; every option, defaults included.") if self.world.is_main else None
        folder.start(self.resume, config_text)
        if not self.resume:
            return Position(), {}
        tensors, meta = load_checkpoint(folder.checkpoint)
        if meta.get("version") != CHECKPOINT_VERSION:
            raise InputError(f"checkpoint version {meta.get('version')} is not "
                             f"{CHECKPOINT_VERSION}", path=str(folder.checkpoint))
        position = Position.from_meta(meta["position"])
        if self.world.is_main:
            folder.truncate_metrics(position.metrics_bytes)
        return position, tensors

    def _prepare(self, position: Position) -> None:
        """Read the data (unless given), the warm-start grammar and the symbol names; note them."""
        cfg = self.cfg
        if self.data is None:
            self.data = load_data(cfg)
        if self.dev is None:
            self.dev = DevLikelihood(self.data, cfg.train.batch_size, self.budget, self.dtype)
        self.warm = None
        if cfg.model.warm_start is not None:
            self.warm = load_grammar(cfg.model.warm_start, renormalize=True)
        if self.warm is not None:
            self.nonterminals = list(self.warm.nonterminals)
            self.preterminals = list(self.warm.preterminals)
        else:
            self.nonterminals, self.preterminals = symbol_names(cfg.model.nonterminals,
                                                                cfg.model.preterminals)
        if self.resume:
            self._note(f"resuming at restart {position.restart}, epoch {position.epoch}, "
                       f"batch {position.batch}")
            return
        self._note(f"treewright train: method {cfg.train.method}, {cfg.model.parameterization} "
                   f"parameters, {len(self.nonterminals)} nonterminals, "
                   f"{len(self.preterminals)} preterminals, vocabulary {len(self.data.vocab)}")
        for note in self.data.notes:
            self._note(note)
        if self.world.is_main:
            self.folder.write_data_summary(summary(self.data))

    def _log_baselines(self) -> None:
        """The unigram model's dev likelihood and the dev evaluator's reference systems, once,
        so that every dev figure printed later can be read beside them."""
        data = self.data
        if data.dev_ids:
            baseline = unigram_logprobs(data.train_ids, data.dev_ids, len(data.vocab))
            words = sum(map(len, data.dev_ids))
            start = {"baseline/unigram_dev_loglik_per_word": sum(baseline) / words}
            metrics, notes = self.dev.baselines()
            start.update(metrics)
            for note in notes:
                self._note(note)
            self.loggers.log(start, 0)

    def _note_budget(self) -> None:
        data = self.data
        if self.budget.max_bytes is not None and not isinstance(data.train_ids, StreamedCorpus):
            over = [i for i, s in enumerate(data.train_ids) if len(s) > self.budget.max_length]
            self._note(f"memory budget {self.cfg.train.memory_budget_mb} MB: sentences of up "
                       f"to {self.budget.max_length} words fit; {len(over)} longer training "
                       "sentences set aside" + (f" (first at index {over[0]})" if over else ""))

    def _new_model(self, restart: int) -> RuleModel:
        m = self.cfg.model
        if self.warm is not None:
            return tabular_from_grammar(self.warm, self.data.vocab, m.warm_start_mix,
                                        dtype=self.dtype, source=str(m.warm_start))
        gen = torch.Generator().manual_seed(restart_seed(self.cfg.train.seed, restart))
        return PARAMETERIZATIONS[m.parameterization].from_options(m, len(self.data.vocab), gen,
                                                                  self.dtype)

    # ---- batches (the curriculum's, at the epoch being trained) ----------------------------

    def _batch(self, indices: list[int]) -> Batch:
        return self.curriculum.batch(self.data, indices, self.epoch_, self.dtype)

    def bias_scale(self, epoch: int) -> float:
        return self.curriculum.bias_scale(epoch)

    # ---- state, checks and logs -------------------------------------------------------------

    def current_rules(self):
        """The grammar as it stands (VB: the posterior mean), without gradient; factored for
        the low-rank parameterization."""
        return self.method.rules()

    def checkpoint(self, position: Position) -> None:
        if not self.world.is_main:
            return
        position.metrics_bytes = self.folder.metrics_size()
        tensors = {f"model.{k}": v for k, v in self.model.state_dict().items()}
        tensors.update(self.method.state_tensors())
        save_checkpoint(self.folder.checkpoint, tensors,
                        {"version": CHECKPOINT_VERSION, "config": config_to_dict(self.cfg),
                         "position": position.to_meta()})

    def _guard(self, fn, position: Position):
        try:
            return fn()
        except DivergedError as err:
            ckpt = self.folder.checkpoint
            where = f"the last good checkpoint, {ckpt}, is left as it was" if ckpt.exists() \
                else "no checkpoint had been written yet"
            message = (f"training stopped at restart {position.restart}, epoch "
                       f"{position.epoch}, step {position.step + 1}: {err}; {where}. Lower "
                       f"optimizer.lr, set optimizer.grad_clip, or use train.dtype=float64.")
            self._note(message)
            raise TrainingDiverged(message) from None

    def _check_finite(self) -> None:
        for name, p in self.model.named_parameters():
            if bool(torch.isnan(p).any()) or bool((p == float("inf")).any()):
                raise DivergedError(f"parameter {name} became NaN or infinite")

    def _log_epoch(self, metrics: dict, step: int) -> None:
        self.loggers.log(metrics, step)
        self.headline.log({k: metrics[k] for k in HEADLINE if k in metrics}, step)

    def _note(self, text: str) -> None:
        if self.world.is_main:
            self.folder.note(text, self.stream)

    # ---- the end of a restart and of the run ------------------------------------------------

    def _finish_restart(self, restart: int, position: Position) -> None:
        rules = self.current_rules()
        path = self.folder.restart_grammar(restart)
        start = self.warm.start if self.warm is not None else "ROOT"
        grammar, note = capped_grammar(rules, self.nonterminals, self.preterminals,
                                       self.data.vocab, start, self.cfg.output.max_saved_rules)
        if note is not None:
            self._note(f"{path.name}: {note}")
        if self.world.is_main:
            grammar.save(path)
        dev = self.dev(self.model.scorer(rules))
        train_ll = position.previous_objective
        position.finished.append({"restart": restart, "grammar": path.name,
                                  "dev_loglik_per_word": dev.get("dev/loglik_per_word"),
                                  "final_objective_per_word": train_ll})
        self._note(f"restart {restart} finished: dev log-likelihood per word "
                   f"{dev.get('dev/loglik_per_word')}, training objective per word {train_ll}")
        position.restart = restart + 1
        position.epoch = position.batch = position.restart_step = 0
        position.previous_objective = None
        self.checkpoint(position)

    def _finish_run(self, position: Position) -> RunResult:
        def key(r: dict) -> float:
            value = r["dev_loglik_per_word"] if self.data.dev_ids else \
                r["final_objective_per_word"]
            return float("-inf") if value is None or math.isnan(value) else value

        best = max(position.finished, key=key)
        self.best_restart_ = best["restart"]
        self.results_ = position.finished
        self.grammar_path_ = self.folder.grammar
        result = RunResult(self.grammar_path_, self.best_restart_, self.results_)
        if not self.world.is_main:
            return result
        # Copy the bytes rather than re-render: the result is exactly the restart's file. Written
        # atomically, so a kill mid-copy never leaves a half-written grammar.pcfg.
        atomic_write_bytes(self.folder.grammar, (self.run_dir / best["grammar"]).read_bytes())
        record = {"best_restart": best["restart"], "selected_by": "dev log-likelihood"
                  if self.data.dev_ids else "training objective",
                  "restarts": position.finished}
        atomic_write_text(self.folder.result, json.dumps(record, indent=2) + "\n")
        self._note(f"kept restart {best['restart']}; grammar written to {self.folder.grammar}")
        return result

    def _stop_now(self, max_steps: int | None) -> bool:
        """Whether to stop at this step boundary: on a Ctrl-C heard by any worker (all of them
        vote, so that they stop after the same step), or after `max_steps` in this session."""
        interrupted = self.world.any_true(self.stop.requested)
        return interrupted or max_steps is not None and self.session_steps >= max_steps


def epoch_metrics(sums: dict) -> dict[str, float]:
    """Epoch metrics from summed log-likelihood, words, sentences, unparsed. For batch EM
    and VB the likelihood is that of the grammar before the epoch's update; for online EM
    and gradient training it is summed over the minibatches as the grammar moved."""
    words = sums["words"]
    per_word = sums["loglik"] / words if words else float("nan")
    out = {"train/loglik_per_word": per_word,
           "train/perplexity": math.exp(-per_word) if words else float("nan"),
           "train/sentences": sums["sentences"], "train/unparsed": sums["unparsed"]}
    if sums.get("kl") and words:
        # Compound: train/loglik_per_word is log p(x | z) at the sampled z; the ELBO
        # subtracts the KL term.
        out["train/kl_per_word"] = sums["kl"] / words
        out["train/elbo_per_word"] = (sums["loglik"] - sums["kl"]) / words
    return out


def capped_grammar(rules, nonterminals: list[str], preterminals: list[str], vocab, start: str,
                   limit: int | None):
    """The rules as a `Grammar` to save, with at most `limit` binary rules (each nonterminal's
    most probable, renormalised), and a note saying what was left out (None: nothing)."""
    dense = rules.dense()
    note = None
    if limit is not None and dense.binary.numel() > limit:
        per_symbol = max(1, limit // len(nonterminals))
        binary, removed = keep_most_probable(dense.binary, per_symbol)
        dense = RuleTensors(dense.root, binary, dense.lexical)
        worst = int(removed.argmax())
        note = (f"the model has {dense.binary.numel():,} binary rules, more than "
                f"output.max_saved_rules ({limit:,}); saved each nonterminal's {per_symbol:,} "
                f"most probable, renormalised, leaving out probability mass "
                f"{float(removed.mean()):.4g} per nonterminal on average (at most "
                f"{float(removed[worst]):.4g}, {nonterminals[worst]}); the checkpoint keeps the "
                "full model")
    return rules_to_grammar(dense, nonterminals, preterminals, vocab, start), note


def saved_config(run_dir: str | Path) -> TrainConfig:
    """The config stored in the checkpoint of the run in `run_dir`."""
    ckpt = RunFolder(run_dir, "train").checkpoint
    _, meta = load_checkpoint(ckpt)
    return train_config_from_dict(meta["config"], str(ckpt))
