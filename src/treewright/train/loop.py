"""The training loop: one run folder, several restarts, every method of the config.

Order of one run (top to bottom below): read the corpora and build the batches; for each restart,
initialise (seeded) and run the epochs of its method; after each epoch evaluate on dev, log and
checkpoint; at the end keep the restart with the best dev likelihood as `grammar.pcfg`.

Run folder::

    config.yaml        the resolved config (every option)
    train.log          what was read, set aside and decided, in words
    metrics.jsonl      one JSON object per logged step (tracking.JsonlLogger)
    tensorboard/       TensorBoard event files
    checkpoint.ckpt    the last checkpoint (safeio container, written atomically)
    restart-<r>.pcfg   the final grammar of each finished restart
    grammar.pcfg       the best restart's grammar (the result)
    result.json        per-restart scores and which restart was kept

Resuming reads `checkpoint.ckpt` and continues at the recorded position. Everything random is a
pure function of (seed, restart, epoch), so the position (restart, epoch, batch) plus the
parameters, the method's statistics and Adam's moments is the whole state; in float64 a resumed
run ends with the same bits as one that was never interrupted.
"""

from __future__ import annotations

import json
import functools
import math
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TextIO

import torch

from treewright.engine.memory import inside_outside_bytes
from treewright.config import config_to_dict, dump_config_yaml
from treewright.corpus import ReadOptions, length_batches, read_corpus
from treewright.decode import mbr_spans
from treewright.errors import InputError
from treewright.evaluation import evaluate_brackets, spans_to_tree
from treewright.grammar import load_grammar
from treewright.params import (CompoundParams, LowRankParams, LowRankRules, NeuralParams,
                               TabularParams, symbol_names, tabular_from_grammar)
from treewright.params.tabular import RuleTensors
from treewright.safeio import (atomic_write_bytes, atomic_write_text, check_writable,
                              load_checkpoint, save_checkpoint)
from treewright.tracking import JsonlLogger, MultiLogger, Progress, StdoutLogger, \
    TensorBoardLogger
from treewright.trees import Tree
from treewright.train import updates
from treewright.train.config import TrainConfig, train_config_from_dict
from treewright.train.distributed import LocalWorld, StreamedCorpus, plan_sentences
from treewright.train.estep import (Batch, DivergedError, ExpectedCounts, add_counts,
                                    batch_counts, compound_log_partition,
                                    compound_span_posteriors, edge_bias, log_partition_of,
                                    make_batch, sentence_logliks, span_posteriors,
                                    terminal_scores, zero_counts)
from treewright.train.metrics import rule_entropies, unigram_logprobs
from treewright.train.schedule import learning_rate

CHECKPOINT = "checkpoint.ckpt"
GRAMMAR = "grammar.pcfg"  # the finished run's grammar
CHECKPOINT_VERSION = 1
EM_FAMILY = ("em", "map_em", "vb")


class TrainingDiverged(RuntimeError):
    """Training met a NaN or infinite loss; the last good checkpoint is left as it was."""


# ---------------------------------------------------------------------------------------------
# Data


@dataclass
class TrainData:
    """Word ids of the training and dev sentences, and what the trainer needs beside them."""
    vocab: object
    train_ids: list[list[int]] | StreamedCorpus   # StreamedCorpus with data.stream_chunk
    brackets: list[list[tuple[int, int]]] | None     # per training sentence, when constrained
    dev_ids: list[list[int]]
    dev_words: list[list[str]]
    dev_trees: list[Tree] | None
    notes: list[str]


def _brackets_of(tree: Tree) -> list[tuple[int, int]]:
    n = len(tree.leaves())
    return sorted({(i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2 and (i, j) != (0, n)})


def load_data(cfg: TrainConfig) -> TrainData:
    """Read the corpora of `cfg.data` (InputError on bad files), encode them with the training
    vocabulary, and collect the partial brackets when `constraints.train_brackets` asks."""
    d = cfg.data
    drop = frozenset(t.strip() for t in (d.drop_tags or "").split(",") if t.strip())
    options = ReadOptions(lowercase=d.lowercase, case_rules=d.case_rules, tag_mode=d.tag_mode,
                          max_length=d.max_length, min_count=d.min_count,
                          max_vocab=d.max_vocab, punct_labels=drop)
    if d.stream_chunk is not None:
        train = StreamedCorpus(d.train, d.format, options, d.stream_chunk)
    else:
        train = read_corpus(d.train, d.format, options)
    notes = ["training corpus: " + train.report.format().replace("\n", "; ")]
    vocab = train.vocabulary
    brackets = None
    if cfg.constraints.train_brackets:
        if any(s.tree is None for s in train.sentences):
            raise InputError("constraints.train_brackets needs trees in the training corpus "
                             "(bracketed trees or CoNLL-U)", path=str(d.train))
        brackets = [_brackets_of(s.tree) for s in train.sentences]
        notes.append(f"partial brackets: {sum(map(len, brackets))} over "
                     f"{len(brackets)} sentences")
    dev_ids: list[list[int]] = []
    dev_words: list[list[str]] = []
    dev_trees = None
    if d.dev is not None:
        dev = read_corpus(d.dev, d.format, ReadOptions(
            lowercase=d.lowercase, case_rules=d.case_rules, tag_mode=d.tag_mode,
            max_length=d.max_length, vocabulary=vocab, punct_labels=drop))
        notes.append("dev corpus: " + dev.report.format().replace("\n", "; "))
        dev_ids = [dev.encode(s) for s in dev.sentences]
        dev_words = [list(s.words) for s in dev.sentences]
        if all(s.tree is not None for s in dev.sentences):
            dev_trees = [s.tree for s in dev.sentences]
    train_ids = train if d.stream_chunk is not None else \
        [train.encode(s) for s in train.sentences]
    return TrainData(vocab, train_ids, brackets, dev_ids, dev_words, dev_trees, notes)


# ---------------------------------------------------------------------------------------------
# State


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


def _dtype(cfg: TrainConfig) -> torch.dtype:
    return torch.float64 if cfg.train.dtype == "float64" else torch.float32


class Trainer:
    """Trains `cfg` into `run_dir`. `run(max_steps)` may stop early (after `max_steps` updates
    of this session, with a checkpoint) and a new Trainer with `resume=True` continues.

    Fitted state after `run`: `best_restart_`, `results_` (per restart), `grammar_path_`.
    """

    def __init__(self, cfg: TrainConfig, run_dir: str | Path, resume: bool = False,
                 stream: TextIO | None = None, config_source: str | None = None,
                 world: LocalWorld | None = None):
        self.cfg = cfg
        # The data-parallel group (train.distributed); only its rank 0 writes the run folder.
        self.world = LocalWorld() if world is None else world
        self.run_dir = Path(run_dir)
        self.resume = resume
        self.stream = sys.stderr if stream is None else stream
        self.config_source = config_source
        self.dtype = _dtype(cfg)
        self.epoch_ = 0  # the epoch being trained (the structural bias depends on it)

    # ---- setting up -------------------------------------------------------------------------

    def _open(self) -> tuple[Position, dict[str, torch.Tensor]]:
        check_writable(self.run_dir)
        ckpt = self.run_dir / CHECKPOINT
        tensors: dict[str, torch.Tensor] = {}
        if self.resume:
            tensors, meta = load_checkpoint(ckpt)
            if meta.get("version") != CHECKPOINT_VERSION:
                raise InputError(f"checkpoint version {meta.get('version')} is not "
                                 f"{CHECKPOINT_VERSION}", path=str(ckpt))
            position = Position.from_meta(meta["position"])
            metrics = self.run_dir / "metrics.jsonl"
            # Lines logged after the checkpoint belong to steps that will run again.
            if metrics.exists() and self.world.is_main:
                with open(metrics, "r+b") as f:
                    f.truncate(position.metrics_bytes)
        else:
            if ckpt.exists():
                raise InputError("the run folder already holds a checkpoint; continue it with "
                                 "--resume or choose another output.run_dir",
                                 path=str(self.run_dir))
            if self.world.is_main:
                atomic_write_text(self.run_dir / "config.yaml", dump_config_yaml(
                    self.cfg, header=f"Resolved training config"
                    f"{' from ' + self.config_source if self.config_source else ''}"
                    f"; every option, defaults included."))
            position = Position()
        return position, tensors

    def _note(self, text: str) -> None:
        if not self.world.is_main:
            return
        with open(self.run_dir / "train.log", "a", encoding="utf-8") as f:
            f.write(f"{time.strftime('%Y-%m-%d %H:%M:%S')} {text}\n")
        self.stream.write(text + "\n")
        self.stream.flush()

    def _names(self) -> tuple[list[str], list[str]]:
        if self.warm is not None:
            return list(self.warm.nonterminals), list(self.warm.preterminals)
        return symbol_names(self.cfg.model.nonterminals, self.cfg.model.preterminals)

    def _new_model(self, restart: int) -> torch.nn.Module:
        m = self.cfg.model
        gen = torch.Generator().manual_seed(restart_seed(self.cfg.train.seed, restart))
        v = len(self.data.vocab)
        if self.warm is not None:
            model = tabular_from_grammar(self.warm, self.data.vocab, m.warm_start_mix,
                                         dtype=self.dtype, source=str(m.warm_start))
            return model
        if m.parameterization == "neural":
            return NeuralParams(m.nonterminals, m.preterminals, v, m.embedding_dim,
                                m.residual_blocks, gen, self.dtype)
        if m.parameterization == "compound":
            return CompoundParams(m.nonterminals, m.preterminals, v, m.latent_dim,
                                  m.embedding_dim, m.residual_blocks, gen, self.dtype)
        if m.parameterization == "lowrank":
            return LowRankParams(m.nonterminals, m.preterminals, v, m.rank, m.embedding_dim,
                                 m.residual_blocks, gen, self.dtype)
        return TabularParams(m.nonterminals, m.preterminals, v, m.init_scale, gen, self.dtype)

    # ---- batches ----------------------------------------------------------------------------

    def length_cap(self, epoch: int) -> int | None:
        """The curriculum's length cap at `epoch` (None: no cap)."""
        c = self.cfg.curriculum
        if c.start_length is None:
            return None
        return c.start_length + c.increment * (epoch // c.every_epochs)

    def epoch_plan(self, restart: int, epoch: int) -> list[list[int]]:
        """Training sentence indices of each batch of `epoch`, in the order they run. A pure
        function of (config, restart, epoch): this is what makes resume exact."""
        cap = self.length_cap(epoch)
        ids = self.data.train_ids
        shuffle = self.cfg.train.shuffle and self.cfg.train.method not in EM_FAMILY
        seed = restart_seed(self.cfg.train.seed, restart) * 100_003 + epoch
        if isinstance(ids, StreamedCorpus):
            return ids.epoch_plan(cap, self.cfg.train.batch_size, shuffle, seed)
        keep = [i for i in range(len(ids)) if (cap is None or len(ids[i]) <= cap)
                and len(ids[i]) <= self.budget_length]
        groups = length_batches([len(ids[i]) for i in keep], self.cfg.train.batch_size,
                                max_cost=self.budget_bytes, cost=self.sentence_bytes,
                                shuffle=shuffle, seed=seed)
        return [[keep[k] for k in g] for g in groups]

    # The memory budget: per-sentence cost of one inside-outside call, the budget in bytes, and
    # the longest sentence that fits it alone (longer ones are set aside at the start).
    def sentence_bytes(self, length: int) -> float:
        m = self.cfg.model
        return inside_outside_bytes(1, length, m.nonterminals, m.preterminals,
                                    torch.finfo(self.dtype).bits // 8,
                                    rules_per_sentence=m.parameterization == "compound",
                                    rank=m.rank if m.parameterization == "lowrank" else None)

    @property
    def budget_bytes(self) -> float | None:
        mb = self.cfg.train.memory_budget_mb
        return None if mb is None else mb * 2 ** 20

    @functools.cached_property
    def budget_length(self) -> float:
        if self.budget_bytes is None:
            return math.inf
        length = 0
        while length < 100_000 and self.sentence_bytes(length + 1) <= self.budget_bytes:
            length += 1
        return length

    def _batch(self, indices: list[int]) -> Batch:
        batch = make_batch(indices, self.data.train_ids, self.data.brackets, self.dtype)
        scale = self.bias_scale(self.epoch_)
        b = self.cfg.bias
        if scale > 0 and (b.right_edge != 0 or b.left_edge != 0):
            pot = edge_bias(batch.lengths, int(batch.ids.shape[1]), scale * b.right_edge,
                            scale * b.left_edge, self.dtype)
            batch.span_pot = pot if batch.span_pot is None else batch.span_pot + pot
        return batch

    def bias_scale(self, epoch: int) -> float:
        """Strength of the structural bias at `epoch`: 1, falling linearly to 0 at
        `bias.anneal_epochs` (Smith & Eisner 2006 anneal theirs the same way)."""
        n = self.cfg.bias.anneal_epochs
        return 1.0 if n == 0 else max(0.0, 1.0 - epoch / n)

    # ---- evaluation -------------------------------------------------------------------------

    def current_rules(self) -> RuleTensors | LowRankRules:
        """The grammar as it stands (VB: the posterior mean), without gradient; factored for
        the low-rank parameterization."""
        with torch.no_grad():
            if self.cfg.train.method == "vb" and "vb.root" in self.stats:
                return updates.vb_mean(self._stat_rules("vb"))
            rules = self.model.rules()
            return type(rules)(*(x.detach() for x in rules))

    def evaluate_dev(self, rules: RuleTensors) -> dict[str, float]:
        """Dev log-likelihood per word, perplexity, and bracket F1 of MBR trees (with gold)."""
        data = self.data
        if not data.dev_ids:
            return {}
        total, words, unparsed = 0.0, 0, 0
        predicted: list[Tree | None] = [None] * len(data.dev_ids)
        fits = [i for i, s in enumerate(data.dev_ids) if len(s) <= self.budget_length]
        for i in set(range(len(data.dev_ids))) - set(fits):
            predicted[i] = Tree("X", list(data.dev_words[i]))  # not parsed: no brackets
        for part in length_batches([len(data.dev_ids[i]) for i in fits],
                                   self.cfg.train.batch_size, max_cost=self.budget_bytes,
                                   cost=self.sentence_bytes):
            group = [fits[k] for k in part]
            batch = make_batch(group, data.dev_ids, None, self.dtype)
            if isinstance(self.model, CompoundParams):
                # Each sentence's grammar at the mean of q(z | x); the score is the ELBO with
                # z at that mean (the KL term of the sample-free bound).
                with torch.no_grad():
                    crules = self.model.sentence_rules(batch.ids, batch.lengths)
                logz, marginals = compound_span_posteriors(crules, batch.ids, batch.lengths)
                logz = logz - crules.kl
                if data.dev_trees is not None:
                    for b, i in enumerate(group):
                        spans = mbr_spans(marginals[b], len(data.dev_ids[i]))
                        predicted[i] = spans_to_tree(data.dev_words[i], spans)
            elif data.dev_trees is None:
                logz = sentence_logliks(rules, batch)
            else:
                logz, marginals = span_posteriors(rules, terminal_scores(rules.lexical,
                                                                         batch.ids),
                                                  batch.lengths)
                for b, i in enumerate(group):
                    spans = mbr_spans(marginals[b], len(data.dev_ids[i]))
                    predicted[i] = spans_to_tree(data.dev_words[i], spans)
            ok = torch.isfinite(logz)
            total += float(logz[ok].sum())
            words += int(batch.lengths[ok].sum())
            unparsed += int((~ok).sum())
        out = {"dev/loglik_per_word": total / words if words else float("nan"),
               "dev/unparsed": unparsed, "dev/over_memory_budget": len(data.dev_ids) - len(fits)}
        out["dev/perplexity"] = math.exp(-out["dev/loglik_per_word"]) if words else float("nan")
        if data.dev_trees is not None:
            scores = evaluate_brackets(predicted, data.dev_trees).systems["model"]
            for name in ("sentence_f1", "corpus_f1"):
                value = getattr(scores, name)
                out[f"dev/{name}"] = float("nan") if value is None else value
        return out

    # ---- state of the method ----------------------------------------------------------------

    def _stat_rules(self, prefix: str) -> RuleTensors:
        return RuleTensors(*(self.stats[f"{prefix}.{k}"] for k in updates.KINDS))

    def _set_stats(self, prefix: str, rules: RuleTensors) -> None:
        for k, x in zip(updates.KINDS, rules):
            self.stats[f"{prefix}.{k}"] = x

    def _init_method(self) -> None:
        self.stats: dict[str, torch.Tensor] = {}
        self.optimizer = None
        method = self.cfg.train.method
        if method == "online_em":
            # mu starts as the initial distributions themselves (rows summing to one), so a
            # symbol the first minibatch does not reach keeps its initial distribution.
            self._set_stats("mu", RuleTensors(*(x.exp() for x in self.current_rules())))
        if method == "gradient":
            o = self.cfg.optimizer
            self.optimizer = torch.optim.Adam(self.model.parameters(), lr=o.lr,
                                              betas=(o.beta1, o.beta2))

    def _state_tensors(self) -> dict[str, torch.Tensor]:
        tensors = {f"model.{k}": v for k, v in self.model.state_dict().items()}
        tensors.update({f"stats.{k}": v for k, v in self.stats.items()})
        if self.optimizer is not None:
            for index, state in self.optimizer.state_dict()["state"].items():
                for key, value in state.items():
                    tensors[f"adam.{index}.{key}"] = torch.as_tensor(value)
        return tensors

    def _load_state(self, tensors: dict[str, torch.Tensor]) -> None:
        self.model.load_state_dict({k[6:]: v for k, v in tensors.items()
                                    if k.startswith("model.")})
        self.stats = {k[6:]: v for k, v in tensors.items() if k.startswith("stats.")}
        if self.optimizer is not None:
            state: dict[int, dict] = {}
            for key, value in tensors.items():
                if key.startswith("adam."):
                    _, index, name = key.split(".", 2)
                    state.setdefault(int(index), {})[name] = value
            groups = self.optimizer.state_dict()["param_groups"]
            self.optimizer.load_state_dict({"state": state, "param_groups": groups})

    def checkpoint(self, position: Position) -> None:
        if not self.world.is_main:
            return
        self.loggers.flush_jsonl()
        position.metrics_bytes = (self.run_dir / "metrics.jsonl").stat().st_size \
            if (self.run_dir / "metrics.jsonl").exists() else 0
        save_checkpoint(self.run_dir / CHECKPOINT, self._state_tensors(),
                        {"version": CHECKPOINT_VERSION, "config": config_to_dict(self.cfg),
                         "position": position.to_meta()})

    # ---- one update of each method ----------------------------------------------------------

    def _em_epoch(self, plan: list[list[int]], progress: Progress | None) -> dict[str, float]:
        """One iteration of batch EM, MAP-EM or VB over the epoch's sentences."""
        method, alpha = self.cfg.train.method, self.cfg.prior.concentration
        has_posterior = method == "vb" and "vb.root" in self.stats
        rules = updates.vb_log_weights(self._stat_rules("vb")) if has_posterior \
            else self.current_rules()
        total = zero_counts(rules)
        for group in self.world.shard_epoch(plan, self.data.train_ids, self.cfg.train.batch_size):
            total = add_counts(total, batch_counts(rules, self._batch(group)))
            if progress is not None:
                progress.update(len(group))
        mine = total.sentences + total.unparsed
        total = self.world.sum_counts(total)
        if progress is not None:      # the other workers' sentences, known once summed
            progress.update(total.sentences + total.unparsed - mine)
        out = self._sums_metrics(_tally(total.loglik, total.words, total.sentences,
                                        total.unparsed))
        previous = self.current_rules()
        if method == "em":
            self.model.set_log_probs(updates.maximum_likelihood(total, previous))
        elif method == "map_em":
            # The objective MAP-EM climbs: log p(x | theta) + log p(theta), the prior's
            # normalising constant left out.
            log_prior = (alpha - 1) * sum(float(x.sum()) for x in previous)
            out["train/log_posterior"] = total.loglik + log_prior
            out["train/log_posterior_per_word"] = out["train/log_posterior"] / max(total.words, 1)
            self.model.set_log_probs(updates.dirichlet_map(total, alpha, previous))
        else:
            if has_posterior:
                # ELBO = sum log Z~ - KL(q(theta) || prior), with q(z) optimal for q(theta)
                # (Kurihara & Sato 2004); computed before q(theta) moves.
                elbo = total.loglik - updates.dirichlet_kl(self._stat_rules("vb"), alpha)
                out["train/elbo"] = elbo
                out["train/elbo_per_word"] = elbo / max(total.words, 1)
            self._set_stats("vb", updates.vb_posterior(total, alpha))
            self.model.set_log_probs(updates.vb_mean(self._stat_rules("vb")))
        self._check_finite()
        return out

    def _online_step(self, group: list[int], position: Position) -> dict[str, float]:
        rules = self.current_rules()
        mine = self.world.shard_batch(group, self.data.train_ids)
        counts = self.world.sum_counts(batch_counts(rules, self._batch(mine)) if mine
                                       else zero_counts(rules))
        rate = updates.stepwise_rate(position.restart_step, self.cfg.online.stepsize_power)
        scale = len(self.data.train_ids) / len(group)
        mu = updates.stepwise_update(self._stat_rules("mu"), counts, scale, rate)
        self._set_stats("mu", mu)
        # The M-step reads the running statistics as if they were one corpus's counts.
        statistics = ExpectedCounts(mu.root, mu.binary, mu.lexical, 0.0, 0, 0, 0)
        self.model.set_log_probs(updates.dirichlet_map(statistics, self.cfg.prior.concentration,
                                                       rules))
        self._check_finite()
        return _tally(counts.loglik, counts.words, counts.sentences, counts.unparsed)

    def _gradient_step(self, group: list[int], position: Position, total_steps: int
                       ) -> tuple[dict[str, float], dict[str, float]]:
        o = self.cfg.optimizer
        mine = self.world.shard_batch(group, self.data.train_ids)
        compound = isinstance(self.model, CompoundParams)
        rules = None if compound else self.model.rules()
        kl = None
        if mine:
            batch = self._batch(mine)
            if compound:
                # One reparameterized sample per sentence, drawn from a generator seeded by the
                # step, so that a resumed run draws the same samples.
                gen = torch.Generator().manual_seed(
                    restart_seed(self.cfg.train.seed, 0) * 7_919 + 1 + position.step)
                crules = self.model.sentence_rules(batch.ids, batch.lengths, gen)
                logz = compound_log_partition(crules, batch.ids, batch.lengths, batch.span_pot)
                kl = crules.kl
            else:
                logz = log_partition_of(rules, terminal_scores(rules.lexical, batch.ids),
                                        batch.lengths, span_pot=batch.span_pot)  # (B,)
        else:
            batch = None
            # A worker dealt nothing still joins the all-reduce.
            logz = next(self.model.parameters()).new_zeros(0)
        if bool(torch.isnan(logz).any() | (logz == float("inf")).any()):
            raise DivergedError("the log-likelihood of a batch is NaN or infinite")
        parsed = torch.isfinite(logz)
        # The loss is divided by the words of the whole minibatch over all workers.
        kl_sum = kl[parsed].sum() if kl is not None else logz.new_zeros(())
        loglik, words, sentences, unparsed, kl_total = self.world.sum_values(
            [float(logz[parsed].sum().detach()), 0 if batch is None else
             int(batch.lengths[parsed].sum()), int(parsed.sum()), int((~parsed).sum()),
             float(kl_sum.detach())])
        words = int(words)
        # Compound: the negative ELBO, log p(x | z) - KL(q || prior), per word.
        loss = -(logz[parsed].sum() - kl_sum) / max(words, 1)
        self.optimizer.zero_grad()
        if batch is not None:
            loss.backward()
        if self.world.size > 1:
            self.world.sum_gradients(list(self.model.parameters()))
        params = [p for p in self.model.parameters() if p.grad is not None]
        if o.grad_clip is not None:
            norm = float(torch.nn.utils.clip_grad_norm_(params, o.grad_clip))
        else:
            norm = float(torch.linalg.vector_norm(torch.stack(
                [torch.linalg.vector_norm(p.grad) for p in params])))
        if not math.isfinite(norm):
            raise DivergedError("the gradient norm is NaN or infinite")
        lr = learning_rate(position.restart_step, total_steps, o.lr, o.warmup_steps,
                           o.schedule, o.min_lr_ratio)
        for group_ in self.optimizer.param_groups:
            group_["lr"] = lr
        self.optimizer.step()
        self._check_finite()
        tally = _tally(loglik, words, int(sentences), int(unparsed), kl_total)
        return tally, {"lr": lr, "grad_norm": norm}

    def _check_finite(self) -> None:
        for name, p in self.model.named_parameters():
            if bool(torch.isnan(p).any()) or bool((p == float("inf")).any()):
                raise DivergedError(f"parameter {name} became NaN or infinite")

    @staticmethod
    def _sums_metrics(sums: dict) -> dict[str, float]:
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

    # ---- the run ----------------------------------------------------------------------------

    def run(self, max_steps: int | None = None) -> bool:
        """Train until done (returns True) or until `max_steps` updates ran in this session
        (returns False, after a checkpoint). Raises TrainingDiverged on NaN/inf."""
        position, tensors = self._open()
        self.interrupted_ = False
        self.data = load_data(self.cfg)
        self.warm = None
        if self.cfg.model.warm_start is not None:
            self.warm = load_grammar(self.cfg.model.warm_start, renormalize=True)
        self.nonterminals, self.preterminals = self._names()
        if not self.resume:
            self._note(f"treewright train: method {self.cfg.train.method}, "
                       f"{self.cfg.model.parameterization} parameters, "
                       f"{len(self.nonterminals)} nonterminals, {len(self.preterminals)} "
                       f"preterminals, vocabulary {len(self.data.vocab)}")
            for note in self.data.notes:
                self._note(note)
        else:
            self._note(f"resuming at restart {position.restart}, epoch {position.epoch}, "
                       f"batch {position.batch}")
        self.loggers = _Loggers(self.run_dir, self.cfg, enabled=self.world.is_main)
        previous_handler = self._catch_sigint()
        self.world.on_stop_request(self._request_stop)
        try:
            if not self.resume and self.data.dev_ids:
                baseline = unigram_logprobs(self.data.train_ids, self.data.dev_ids,
                                            len(self.data.vocab))
                words = sum(map(len, self.data.dev_ids))
                start = {"baseline/unigram_dev_loglik_per_word": sum(baseline) / words}
                if self.data.dev_trees is not None:
                    # The branching baselines on the dev trees, once, so that every dev F1
                    # printed later can be read beside them.
                    systems = evaluate_brackets(None, self.data.dev_trees).systems
                    for name in ("left_branching", "right_branching", "random_binary"):
                        start[f"baseline/dev_{name}_sentence_f1"] = systems[name].sentence_f1
                    self._note("dev sentence F1 of the baselines: " + ", ".join(
                        f"{name.replace('_', '-')} {systems[name].sentence_f1:.3f}"
                        for name in ("left_branching", "right_branching", "random_binary")))
                self.loggers.log(start, 0)
            if self.budget_bytes is not None and not isinstance(self.data.train_ids,
                                                                StreamedCorpus):
                over = [i for i, s in enumerate(self.data.train_ids)
                        if len(s) > self.budget_length]
                self._note(f"memory budget {self.cfg.train.memory_budget_mb} MB: sentences of "
                           f"up to {self.budget_length} words fit; {len(over)} longer training "
                           "sentences set aside" + (f" (first at index {over[0]})" if over
                                                    else ""))
            session = [0]
            for restart in range(position.restart, self.cfg.train.restarts):
                self.model = self._new_model(restart)
                self._init_method()
                # A checkpoint taken between restarts holds the finished restart's state.
                if tensors and position.restart_step > 0:
                    self._load_state(tensors)
                tensors = {}
                if not self._run_restart(restart, position, session, max_steps):
                    return False
                self._finish_restart(restart, position)
            self._finish_run(position)
            return True
        finally:
            if previous_handler is not None:
                signal.signal(signal.SIGINT, previous_handler)
            self.loggers.close()

    def _catch_sigint(self):
        """Make Ctrl-C stop at the next step boundary, after a checkpoint (`interrupted_` is
        then True and `run` returns False); a second Ctrl-C interrupts at once. Returns the
        handler to restore, or None off the main thread, where signals cannot be caught.
        (Workers started by a launcher hear of a Ctrl-C from it, through `_request_stop`.)"""
        if threading.current_thread() is not threading.main_thread():
            return None

        def on_sigint(signum, frame):
            if self.interrupted_:
                raise KeyboardInterrupt
            self._request_stop()
            self.stream.write("\ninterrupt: stopping after this step with a checkpoint "
                              "(Ctrl-C again to stop at once)\n")
            self.stream.flush()

        return signal.signal(signal.SIGINT, on_sigint)

    def _request_stop(self) -> None:
        self.interrupted_ = True

    def _stop_now(self, max_steps: int | None, session: list[int]) -> bool:
        """Whether to stop at this step boundary: on a Ctrl-C heard by any worker (all of them
        vote, so that they stop after the same step), or after `max_steps` in this session."""
        interrupted = self.world.any_true(self.interrupted_)
        return interrupted or max_steps is not None and session[0] >= max_steps

    def _run_restart(self, restart: int, position: Position, session: list[int],
                     max_steps: int | None) -> bool:
        cfg = self.cfg
        method = cfg.train.method
        plans = [self.epoch_plan(restart, e) for e in range(cfg.train.epochs)]
        total_steps = sum(map(len, plans))
        if position.restart_step == 0 and position.epoch == 0 and self.data.dev_ids:
            # The starting point, so every run shows what training gained over it.
            start = self.evaluate_dev(self.current_rules())
            self.loggers.log({"restart": restart, **{k.replace("dev/", "init/dev_"): v
                                                     for k, v in start.items()}}, position.step)
        while position.epoch < cfg.train.epochs:
            epoch = position.epoch
            self.epoch_ = epoch
            plan = plans[epoch]
            started = time.monotonic()
            progress = None
            if cfg.output.progress and self.world.is_main:
                progress = Progress(plan_sentences(plan), f"restart {restart} epoch {epoch}",
                                    stream=self.stream)
            try:
                if method in EM_FAMILY:
                    metrics = self._guard(lambda: self._em_epoch(plan, progress), position)
                    position.step += 1
                    position.restart_step += 1
                    session[0] += 1
                else:
                    metrics = self._minibatch_epoch(plan, position, session, max_steps,
                                                    total_steps, progress)
                    if metrics is None:
                        return False
            finally:
                if progress is not None:
                    progress.close()
            elapsed = max(time.monotonic() - started, 1e-9)
            metrics["sentences_per_second"] = plan_sentences(plan) / elapsed
            metrics.update(self.evaluate_dev(self.current_rules()))
            metrics.update(rule_entropies(_dense(self.current_rules()), self.nonterminals,
                                          self.preterminals))
            cap = self.length_cap(epoch)
            metrics.update({"restart": restart, "epoch": epoch,
                            "length_cap": cap if cap is not None else -1})
            self.loggers.log_epoch(metrics, position.step)
            objective = metrics.get("train/elbo_per_word", metrics.get(
                "train/log_posterior_per_word", metrics["train/loglik_per_word"]))
            # Only objectives of the same kind over the same sentences compare: VB's first
            # epoch reports a log-likelihood (no ELBO yet), and a curriculum step changes the
            # data, so neither counts as "improved by less than the tolerance".
            comparable = (epoch >= (2 if method == "vb" else 1)
                          and self.length_cap(epoch - 1) == cap
                          and self.bias_scale(epoch - 1) == self.bias_scale(epoch)
                          and self.length_cap(epoch + 1) == cap)
            converged = (method in EM_FAMILY and cfg.train.tolerance > 0 and comparable
                         and position.previous_objective is not None
                         and objective - position.previous_objective < cfg.train.tolerance)
            position.previous_objective = objective
            position.epoch = cfg.train.epochs if converged else epoch + 1
            position.batch = 0
            position.epoch_sums = Position().epoch_sums
            self.checkpoint(position)
            if converged:
                self._note(f"restart {restart}: converged after epoch {epoch} (objective per "
                           f"word improved by less than {cfg.train.tolerance})")
            if self._stop_now(max_steps, session) and position.epoch < cfg.train.epochs:
                return False
        return True

    def _minibatch_epoch(self, plan, position: Position, session: list[int],
                         max_steps: int | None, total_steps: int, progress) -> dict | None:
        out = self.cfg.output
        sums = position.epoch_sums
        for k in range(position.batch, len(plan)):
            group = plan[k]
            if self.cfg.train.method == "online_em":
                tally = self._guard(lambda: self._online_step(group, position), position)
                extra: dict[str, float] = {}
            else:
                tally, extra = self._guard(
                    lambda: self._gradient_step(group, position, total_steps), position)
            for key, value in tally.items():
                sums[key] = sums.get(key, 0) + value
            position.step += 1
            position.restart_step += 1
            position.batch = k + 1
            session[0] += 1
            if progress is not None:
                progress.update(len(group))
            if position.step % out.log_every_steps == 0:
                step_metrics = {"step/loglik_per_word": tally["loglik"] / max(tally["words"], 1),
                                **extra}
                if self.cfg.train.method == "online_em":
                    step_metrics["step/stepsize"] = updates.stepwise_rate(
                        position.restart_step - 1, self.cfg.online.stepsize_power)
                self.loggers.log(step_metrics, position.step)
            last = k + 1 == len(plan)
            every = out.checkpoint_every_steps
            stop = self._stop_now(max_steps, session)
            if not last and (stop or (every is not None and position.step % every == 0)):
                self.checkpoint(position)
            if stop and not last:
                return None
        return self._sums_metrics(sums)

    def _guard(self, fn, position: Position):
        try:
            return fn()
        except DivergedError as err:
            ckpt = self.run_dir / CHECKPOINT
            where = f"the last good checkpoint, {ckpt}, is left as it was" if ckpt.exists() \
                else "no checkpoint had been written yet"
            message = (f"training stopped at restart {position.restart}, epoch "
                       f"{position.epoch}, step {position.step + 1}: {err}; {where}. Lower "
                       f"optimizer.lr, set optimizer.grad_clip, or use train.dtype=float64.")
            self._note(message)
            raise TrainingDiverged(message) from None

    def _finish_restart(self, restart: int, position: Position) -> None:
        rules = self.current_rules()
        name = f"restart-{restart}.pcfg"
        grammar = self._to_grammar(rules, name)
        if self.world.is_main:
            grammar.save(self.run_dir / name)
        dev = self.evaluate_dev(rules)
        train_ll = position.previous_objective
        position.finished.append({"restart": restart, "grammar": name,
                                  "dev_loglik_per_word": dev.get("dev/loglik_per_word"),
                                  "final_objective_per_word": train_ll})
        self._note(f"restart {restart} finished: dev log-likelihood per word "
                   f"{dev.get('dev/loglik_per_word')}, training objective per word {train_ll}")
        position.restart = restart + 1
        position.epoch = position.batch = position.restart_step = 0
        position.previous_objective = None
        self.checkpoint(position)

    def _to_grammar(self, rules: RuleTensors | LowRankRules, name: str = "the grammar"):
        """The rules as a `Grammar` to save, capped at `output.max_saved_rules` binary rules."""
        from treewright.params.tabular import keep_most_probable, rules_to_grammar
        start = self.warm.start if self.warm is not None else "ROOT"
        dense = _dense(rules)
        limit = self.cfg.output.max_saved_rules
        nt = len(self.nonterminals)
        if limit is not None and dense.binary.numel() > limit:
            per_symbol = max(1, limit // nt)
            binary, removed = keep_most_probable(dense.binary, per_symbol)
            dense = RuleTensors(dense.root, binary, dense.lexical)
            worst = int(removed.argmax())
            self._note(f"{name}: the model has {dense.binary.numel():,} binary rules, more than "
                       f"output.max_saved_rules ({limit:,}); saved each nonterminal's "
                       f"{per_symbol:,} most probable, renormalised, leaving out probability "
                       f"mass {float(removed.mean()):.4g} per nonterminal on average (at most "
                       f"{float(removed[worst]):.4g}, {self.nonterminals[worst]}); the checkpoint "
                       "keeps the full model")
        return rules_to_grammar(dense, self.nonterminals, self.preterminals, self.data.vocab,
                                start)

    def _finish_run(self, position: Position) -> None:
        def key(r: dict) -> float:
            value = r["dev_loglik_per_word"] if self.data.dev_ids else \
                r["final_objective_per_word"]
            return float("-inf") if value is None or math.isnan(value) else value

        best = max(position.finished, key=key)
        self.best_restart_ = best["restart"]
        self.results_ = position.finished
        self.grammar_path_ = self.run_dir / GRAMMAR
        if not self.world.is_main:
            return
        # Copy the bytes rather than re-render: the result is exactly the restart's file. Written
        # atomically, so a kill mid-copy never leaves a half-written grammar.pcfg.
        atomic_write_bytes(self.run_dir / GRAMMAR,
                           (self.run_dir / best["grammar"]).read_bytes())
        result = {"best_restart": best["restart"], "selected_by": "dev log-likelihood"
                  if self.data.dev_ids else "training objective",
                  "restarts": position.finished}
        atomic_write_text(self.run_dir / "result.json", json.dumps(result, indent=2) + "\n")
        self._note(f"kept restart {best['restart']}; grammar written to "
                   f"{self.run_dir / 'grammar.pcfg'}")


def restart_seed(seed: int, restart: int) -> int:
    """The random stream of one restart of one run seed. Distinct for every (seed, restart), so
    that runs with neighbouring seeds never share a start (seed + restart would: seed 0's
    restart 1 would be seed 1's restart 0)."""
    return seed * 1_000_003 + restart


def _dense(rules: RuleTensors | LowRankRules) -> RuleTensors:
    """Dense rule tensors (the low-rank factors multiplied out; NT * S^2 of memory)."""
    return rules.dense() if isinstance(rules, LowRankRules) else rules


def _tally(loglik: float, words: int, sentences: int, unparsed: int, kl: float = 0.0) -> dict:
    return {"loglik": loglik, "words": words, "sentences": sentences, "unparsed": unparsed,
            "kl": kl}


class _Loggers:
    """metrics.jsonl and TensorBoard get everything; stdout gets each epoch's headline numbers."""

    HEADLINE = ("restart", "epoch", "train/loglik_per_word", "train/perplexity",
                "train/elbo_per_word", "dev/loglik_per_word", "dev/perplexity",
                "dev/sentence_f1", "sentences_per_second")

    def __init__(self, run_dir: Path, cfg: TrainConfig, enabled: bool = True):
        # Disabled (workers other than rank 0): every call is a no-op.
        self.jsonl = JsonlLogger(run_dir / "metrics.jsonl") if enabled else None
        loggers = [self.jsonl] if enabled else []
        if cfg.output.tensorboard and enabled:
            loggers.append(TensorBoardLogger(run_dir / "tensorboard"))
        self.all = MultiLogger(loggers)
        self.stdout = StdoutLogger() if cfg.output.stdout_metrics and enabled else None

    def log(self, metrics: dict, step: int) -> None:
        self.all.log(metrics, step)

    def log_epoch(self, metrics: dict, step: int) -> None:
        self.all.log(metrics, step)
        if self.stdout is not None:
            self.stdout.log({k: metrics[k] for k in self.HEADLINE if k in metrics}, step)

    def flush_jsonl(self) -> None:
        if self.jsonl is not None:
            self.jsonl.file.flush()

    def close(self) -> None:
        self.all.close()


def train(cfg: TrainConfig, run_dir: str | Path, stream: TextIO | None = None,
          config_source: str | None = None, world: LocalWorld | None = None) -> Trainer:
    """Train a fresh run into `run_dir` and return the fitted Trainer (`world`: this
    process's data-parallel group, see train.distributed; default one process)."""
    trainer = Trainer(cfg, run_dir, stream=stream, config_source=config_source, world=world)
    trainer.run()
    return trainer


def resume(run_dir: str | Path, stream: TextIO | None = None,
           max_steps: int | None = None, world: LocalWorld | None = None
           ) -> tuple[Trainer, bool]:
    """Continue the run in `run_dir` from its checkpoint (config taken from the checkpoint),
    with any number of workers (`world`)."""
    trainer = Trainer(saved_config(run_dir), run_dir, resume=True, stream=stream, world=world)
    return trainer, trainer.run(max_steps)


def saved_config(run_dir: str | Path) -> TrainConfig:
    """The config stored in the checkpoint of the run in `run_dir`."""
    ckpt = Path(run_dir) / CHECKPOINT
    _, meta = load_checkpoint(ckpt)
    return train_config_from_dict(meta["config"], str(ckpt))
