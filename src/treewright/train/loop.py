"""The training loop: one run folder, several restarts, one update method, one model.

A run reads top to bottom in `Trainer.run`: open the run folder (fresh or from its checkpoint,
`train.start`); note what is trained and log the baselines; for each restart build the model
(`params.PARAMETERIZATIONS`) and the update method (`train.methods.METHODS`), then run its
epochs (`_run_restart`): each epoch is a list of updates (one for the EM family, one per
minibatch otherwise), after which the dev evaluator the caller passed in scores the grammar, the
metrics are logged and a checkpoint is written; the restart's grammar is saved; at the end the
restart with the best dev likelihood (else training objective) becomes the result
(`train.finish`). The file names are those of `runfolder.RunFolder`.

Resuming reads the checkpoint and continues at the recorded position. Everything random is a
pure function of (seed, restart, epoch), so the position (restart, epoch, batch) plus the model's
parameters and the method's tensors is the whole state; in float64 a resumed run ends with the
same bits as one that was never interrupted.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import TextIO

import torch

from treewright.config import config_to_dict
from treewright.runfolder import RunFolder
from treewright.safeio import save_checkpoint
from treewright.tracking import Progress, perplexity
from treewright.train.config import TrainConfig
from treewright.train.curriculum import Curriculum, restart_seed
from treewright.train.data import MemoryBudget, TrainData, load_data, summary
from treewright.train.distributed import LocalWorld, plan_sentences
from treewright.train.estep import Batch, DivergedError
from treewright.train.finish import RunResult, finish_run, restart_record, save_restart_grammar
from treewright.train.methods import METHODS, Step, Update, UpdateMethod
from treewright.train.metrics import rule_entropies
from treewright.train.start import (CHECKPOINT_VERSION, Position, baselines, budget_note,
                                    new_model, open_run, prepare, restore, run_loggers,
                                    saved_config)
from treewright.train.stopping import StopRequest

__all__ = ["Position", "RunResult", "Trainer", "TrainingDiverged", "load_data", "restart_seed",
           "saved_config"]

# Headline numbers of each epoch, the ones printed on the terminal; the files get everything.
HEADLINE = ("restart", "epoch", "train/loglik_per_word", "train/perplexity",
            "train/elbo_per_word", "dev/loglik_per_word", "dev/perplexity", "dev/sentence_f1",
            "sentences_per_second")


class TrainingDiverged(RuntimeError):
    """Training met a NaN or infinite loss; the last good checkpoint is left as it was."""


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

    def run(self, max_steps: int | None = None) -> RunResult | None:
        """Train until done (returns the `RunResult`) or until `max_steps` updates ran in this
        session (returns None, after a checkpoint). Raises TrainingDiverged on NaN/inf."""
        cfg, is_main = self.cfg, self.world.is_main
        position, tensors = open_run(self.folder, cfg, self.resume, self.config_source, is_main)
        self.data, self.dev, self.symbols, notes = prepare(
            cfg, self.data, self.dev, self.budget, self.dtype, position, self.resume)
        self._note(*notes)
        if is_main and not self.resume:
            self.folder.write_data_summary(summary(self.data))
        self.loggers, self.headline = run_loggers(self.folder, cfg, is_main)
        self.world.on_stop_request(self.stop.request)
        with self.stop, self.loggers, self.headline:
            if not self.resume:
                metrics, notes = baselines(self.data, self.dev)
                self._note(*notes)
                if metrics:
                    self.loggers.log(metrics, 0)
            self._note(budget_note(cfg, self.budget, self.data))
            for restart in range(position.restart, cfg.train.restarts):
                self.model = new_model(cfg, self.symbols, self.data.vocab, restart, self.dtype)
                self.method = METHODS[cfg.train.method](cfg, self.model)
                # A checkpoint taken between restarts holds the finished restart's state.
                if tensors and position.restart_step > 0:
                    restore(self.model, self.method, tensors)
                tensors = {}
                if not self._run_restart(restart, position, max_steps):
                    return None
                self._finish_restart(restart, position)
            result, note = finish_run(self.folder, position.finished, bool(self.data.dev_ids),
                                      is_main)
            self.best_restart_, self.results_ = result.best_restart, result.restarts
            self.grammar_path_ = result.grammar_path
            self._note(note)
            return result

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
        gain = None  # the last epoch's gain in the objective, when comparable with the one before
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
                    update = self._guard(step, position)
                    position.count(update.tally, k)
                    self.session_steps += 1
                    if update.step_metrics is not None and \
                            position.step % cfg.output.log_every_steps == 0:
                        self.loggers.log(step_line(update), position.step)
                    extra.update(update.epoch_metrics)
                    if k + 1 < len(updates) and not self._mid_epoch(position, max_steps):
                        return False
            finally:
                if progress is not None:
                    progress.close()
            cap = self.curriculum.length_cap(epoch)
            metrics = {**epoch_metrics(position.epoch_sums), **extra,
                       "sentences_per_second": plan_sentences(plan)
                       / max(time.monotonic() - started, 1e-9),
                       **self.dev(self.model.scorer(method.rules())),
                       **rule_entropies(method.rules(), self.symbols.nonterminals,
                                        self.symbols.preterminals),
                       "restart": restart, "epoch": epoch,
                       "length_cap": cap if cap is not None else -1}
            self.loggers.log(metrics, position.step)
            self.headline.log({k: metrics[k] for k in HEADLINE if k in metrics}, position.step)
            previous = position.previous_objective
            done = converged(self.curriculum, method, cfg.train.tolerance, epoch, metrics,
                             position)
            gain = position.previous_objective - previous \
                if previous is not None and comparable(self.curriculum, method, epoch) else None
            position.next_epoch(cfg.train.epochs if done else epoch + 1)
            self.checkpoint(position)
            if done:
                self._note(f"restart {restart}: converged after epoch {epoch} (objective per "
                           f"word improved by less than {cfg.train.tolerance})")
            if self._stop_now(max_steps) and position.epoch < cfg.train.epochs:
                return False
        if gain is not None and method.converges and cfg.train.tolerance > 0 \
                and gain >= cfg.train.tolerance:
            self._note(f"restart {restart}: stopped at the epoch limit (train.epochs = "
                       f"{cfg.train.epochs}) before converging: its last epoch still improved "
                       f"the objective per word by {gain:.2g} (train.tolerance = "
                       f"{cfg.train.tolerance:g})")
        return True

    def _mid_epoch(self, position: Position, max_steps: int | None) -> bool:
        """Between two updates of an epoch: checkpoint when due or when stopping; False when
        the session stops here."""
        every = self.cfg.output.checkpoint_every_steps
        stop = self._stop_now(max_steps)
        if stop or (every is not None and position.step % every == 0):
            self.checkpoint(position)
        return not stop

    def _finish_restart(self, restart: int, position: Position) -> None:
        """Save the restart's grammar, score it on dev, and checkpoint before the next one."""
        rules = self.current_rules()
        path, note = save_restart_grammar(self.folder, restart, rules, self.symbols,
                                          self.data.vocab, self.cfg.output.max_saved_rules,
                                          self.world.is_main)
        self._note(note)
        record, note = restart_record(restart, path, self.dev(self.model.scorer(rules)),
                                      position.previous_objective)
        position.finished.append(record)
        self._note(note)
        position.next_restart(restart + 1)
        self.checkpoint(position)

    def _stop_now(self, max_steps: int | None) -> bool:
        """Whether to stop at this step boundary: on a Ctrl-C heard by any worker (all of them
        vote, so that they stop after the same step), or after `max_steps` in this session."""
        interrupted = self.world.any_true(self.stop.requested)
        return interrupted or max_steps is not None and self.session_steps >= max_steps

    # ---- batches, state, checks and notes ---------------------------------------------------

    def _batch(self, indices: list[int]) -> Batch:
        """A batch of the curriculum's at the epoch being trained."""
        return self.curriculum.batch(self.data, indices, self.epoch_, self.dtype)

    def bias_scale(self, epoch: int) -> float:
        return self.curriculum.bias_scale(epoch)

    def current_rules(self):
        """The grammar as it stands (VB: the posterior mean), without gradient; factored for
        the low-rank parameterization."""
        return self.method.rules()

    def checkpoint(self, position: Position) -> None:
        if self.world.is_main:
            write_checkpoint(self.folder, self.cfg, self.model, self.method, position)

    def _guard(self, step: Step, position: Position) -> Update:
        """The method's update of `step`, its parameters checked finite; on a NaN or inf, a
        note of where and `TrainingDiverged`."""
        try:
            update = self.method.update(step)
            check_finite(self.model)
            return update
        except DivergedError as err:
            message = diverged_message(err, position, self.folder.checkpoint)
            self._note(message)
            raise TrainingDiverged(message) from None

    def _note(self, *texts: str | None) -> None:
        """Notes for the log and the terminal (rank 0 only); None: nothing to say."""
        for text in texts:
            if text is not None and self.world.is_main:
                self.folder.note(text, self.stream)


def converged(curriculum: Curriculum, method: UpdateMethod, tolerance: float, epoch: int,
              metrics: dict, position: Position) -> bool:
    """Whether the objective improved by less than `tolerance` (methods that converge only);
    records the objective for the next epoch."""
    objective = metrics.get("train/elbo_per_word", metrics.get(
        "train/log_posterior_per_word", metrics["train/loglik_per_word"]))
    done = (method.converges and tolerance > 0 and comparable(curriculum, method, epoch)
            and position.previous_objective is not None
            and objective - position.previous_objective < tolerance)
    position.previous_objective = objective
    return done


def comparable(curriculum: Curriculum, method: UpdateMethod, epoch: int) -> bool:
    """Whether epoch `epoch`'s objective compares with the epoch before's. Only objectives of
    the same kind over the same sentences do: VB's first epoch reports a log-likelihood (no
    ELBO yet), and a curriculum step changes the data, so neither counts as "improved by less
    than the tolerance"."""
    return (epoch >= method.first_comparable_epoch
            and curriculum.same_data(epoch, epoch - 1)
            and curriculum.same_data(epoch + 1, epoch))


def step_line(update: Update) -> dict:
    """The metrics line of one update (methods that log steps)."""
    return {"step/loglik_per_word": update.tally["loglik"] / max(update.tally["words"], 1),
            **update.step_metrics}


def write_checkpoint(folder: RunFolder, cfg: TrainConfig, model: torch.nn.Module,
                     method: UpdateMethod, position: Position) -> None:
    """The checkpoint: the model's parameters, the method's tensors and the position."""
    position.metrics_bytes = folder.metrics_size()
    tensors = {f"model.{k}": v for k, v in model.state_dict().items()}
    tensors.update(method.state_tensors())
    save_checkpoint(folder.checkpoint, tensors,
                    {"version": CHECKPOINT_VERSION, "config": config_to_dict(cfg),
                     "position": position.to_meta()})


def diverged_message(err: DivergedError, position: Position, checkpoint: Path) -> str:
    where = f"the last good checkpoint, {checkpoint}, is left as it was" \
        if checkpoint.exists() else "no checkpoint had been written yet"
    return (f"training stopped at restart {position.restart}, epoch {position.epoch}, step "
            f"{position.step + 1}: {err}; {where}. Lower optimizer.lr, set "
            f"optimizer.grad_clip, or use train.dtype=float64.")


def check_finite(model: torch.nn.Module) -> None:
    for name, p in model.named_parameters():
        if bool(torch.isnan(p).any()) or bool((p == float("inf")).any()):
            raise DivergedError(f"parameter {name} became NaN or infinite")


def epoch_metrics(sums: dict) -> dict[str, float]:
    """Epoch metrics from summed log-likelihood, words, sentences, unparsed. For batch EM
    and VB the likelihood is that of the grammar before the epoch's update; for online EM
    and gradient training it is summed over the minibatches as the grammar moved."""
    words = sums["words"]
    per_word = sums["loglik"] / words if words else float("nan")
    out = {"train/loglik_per_word": per_word,
           "train/perplexity": perplexity(per_word) if words else float("nan"),
           "train/sentences": sums["sentences"], "train/unparsed": sums["unparsed"]}
    if sums.get("kl") and words:
        # Compound: train/loglik_per_word is log p(x | z) at the sampled z; the ELBO
        # subtracts the KL term.
        out["train/kl_per_word"] = sums["kl"] / words
        out["train/elbo_per_word"] = (sums["loglik"] - sums["kl"]) / words
    return out
