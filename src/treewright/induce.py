"""Grammar induction as a library call: the trainer with the dev evaluator that scores brackets.

Training (`train/`) knows nothing of decoding or evaluation; this layer, above both, builds the
dev evaluator (`DevEvaluator`: dev likelihood, and bracket F1 of MBR trees when the dev corpus
has trees) and hands it to the `Trainer`. Entry points:
- `train(cfg, run_dir)` -> the fitted `Trainer`; `resume(run_dir)` -> (Trainer, RunResult or
  None); `run(cfg, run_dir, resume)` -> RunResult or None (None: stopped by Ctrl-C);
- `fit(sentences, cfg, dev=None, dev_trees=None)` -> `Fit`, from token lists in memory, for a
  notebook user who has no files (the run folder is a temporary one unless `run_dir` is given);
- `load_lexicalized(run_dir)` -> `LexicalizedRun`, a trained lexicalized model with its
  vocabulary and symbol names, for `decode.decode_heads`; `lexical_summary_of(run_dir)` ->
  what it learned about words (`export.lexical`), for `inspect` and the report, or None for a
  grammar file or a run of another parameterization.
"""

from __future__ import annotations

import dataclasses
import json
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence, TextIO

import torch
from torch import Tensor

from treewright.corpus import run_read_options
from treewright.decode import (HeadedParse, agreed_spans, consensus, decode, decode_heads,
                               mbr_spans, under_pieces)
from treewright.errors import InputError
from treewright.evaluation import evaluate_brackets, spans_to_tree
from treewright.export.lexical import DEFAULT_PAIRS, LexicalSummary, lexical_summary
from treewright.export.source import (open_grammar, open_restart_grammars, read_training_record,
                                     saved_restarts)
from treewright.grammar import Grammar, load_grammar
from treewright.params import PARAMETERIZATIONS, LexicalizedParams, symbol_names
from treewright.runfolder import GRAMMAR, RunFolder
from treewright.safeio import load_checkpoint
from treewright.train.config import TrainConfig
from treewright.tracking import terminal_progress
from treewright.train.data import (BracketSource, MemoryBudget, TrainData, data_from_sentences,
                                   load_data, tree_brackets)
from treewright.train.dev import DevLikelihood
from treewright.train.distributed import LocalWorld
from treewright.train.loop import RunResult, Trainer, _dtype, saved_config
from treewright.trees import Tree
from treewright.word_pieces import held_at_end

BASELINES = ("left_branching", "right_branching", "random_binary")


class DevEvaluator(DevLikelihood):
    """Dev likelihood, and with gold dev trees the sentence and corpus bracket F1 of the
    minimum-Bayes-risk trees and the branching baselines' F1."""

    def __init__(self, data: TrainData, cfg: TrainConfig):
        dtype = _dtype(cfg)
        super().__init__(data, cfg.train.batch_size, MemoryBudget(cfg, dtype), dtype)
        self.wants_spans = data.dev_trees is not None

    def baselines(self) -> tuple[dict, list[str]]:
        if self.data.dev_trees is None:
            return {}, []
        systems = evaluate_brackets(None, self.data.dev_trees).systems
        metrics = {f"baseline/dev_{name}_sentence_f1": systems[name].sentence_f1
                   for name in BASELINES}
        note = "dev sentence F1 of the baselines: " + ", ".join(
            f"{name.replace('_', '-')} {systems[name].sentence_f1:.3f}" for name in BASELINES)
        return metrics, [note]

    def start(self, unscored: set[int]) -> None:
        self.predicted: list[Tree | None] = [None] * len(self.data.dev_ids)
        for i in unscored:
            self.predicted[i] = Tree("X", list(self.data.dev_words[i]))  # no brackets

    def sentence_spans(self, index: int, marginals: Tensor) -> None:
        spans = mbr_spans(marginals, len(self.data.dev_ids[index]))
        self.predicted[index] = spans_to_tree(self.data.dev_words[index], spans)

    def finish(self) -> dict[str, float]:
        if self.data.dev_trees is None:
            return {}
        scores = evaluate_brackets(self.predicted, self.data.dev_trees).systems["model"]
        out = {}
        for name in ("sentence_f1", "corpus_f1"):
            value = getattr(scores, name)
            out[f"dev/{name}"] = float("nan") if value is None else value
        return out


BRACKET_CHUNK = 256  # training sentences decoded per step of the progress bar


def grammar_brackets(cfg: TrainConfig) -> BracketSource | None:
    """The bracket source of `constraints.brackets_from` (None when it is unset): the trees of
    the training sentences under the run or grammar it names, by the decoder `parse` would use
    for brackets (the consensus of the restarts of a run that saved two or more, else mbr),
    each reduced to its partial brackets (`tree_brackets`). With
    `constraints.brackets_agreement`, each restart's mbr tree instead, and the brackets that
    fraction of them share (`decode.agreed_spans`; InputError for a source with fewer than two
    restarts). A sentence without a parse gets none and trains unconstrained; one longer than
    the memory budget allows (which does not train) is not decoded; the note says how many of
    each.

    The words must reach the source grammar as its own training read them, so a source that
    records its training config (a run folder or JSON export) must have read the corpus with
    the same lowercasing, tag mode and dropped tags as `cfg.data` (InputError naming it
    otherwise)."""
    path = cfg.constraints.brackets_from
    if path is None:
        return None
    source = open_grammar(path)
    config = (source.training or {}).get("config")
    if isinstance(config, dict):
        theirs = run_read_options(config.get("data"))
        ours = run_read_options({"lowercase": cfg.data.lowercase,
                                 "case_rules": cfg.data.case_rules,
                                 "tag_mode": cfg.data.tag_mode,
                                 "drop_tags": cfg.data.drop_tags})
        for field, option in (("tag_mode", "tag_mode"), ("lowercase", "lowercase"),
                              ("case_rules", "case_rules"), ("punct_labels", "drop_tags")):
            if getattr(theirs, field) != getattr(ours, field):
                raise InputError(
                    f"constraints.brackets_from: this grammar's training read its corpus with "
                    f"data.{option} giving {getattr(theirs, field)!r}, this run with "
                    f"{getattr(ours, field)!r}; train both with the same data options",
                    path=str(source.grammar_path))
    restarts = saved_restarts(source)
    agreement = cfg.constraints.brackets_agreement
    if agreement is not None and restarts < 2:
        raise InputError("constraints.brackets_agreement: the bracket source saved "
                         f"{restarts} restart{'s' if restarts != 1 else ''}; agreement needs "
                         "two or more (train it with train.restarts >= 2, or leave "
                         "constraints.brackets_agreement null)", path=str(path))
    grammars = [source.grammar] if restarts < 2 else [
        s.grammar for s in open_restart_grammars(path, "constraints.brackets_from")]
    decoder = "mbr" if restarts < 2 else "the consensus of its restarts" if agreement is None \
        else f"the brackets shared by at least {agreement:.0%} of its {restarts} restarts' mbr " \
        "trees"
    # Sentences the trainer sets aside for its memory budget never train, so they are not
    # decoded either (a long one could take more memory than the budget allows).
    longest = MemoryBudget(cfg, _dtype(cfg)).max_length

    # Decoded as `parse` decodes: under the word-piece constraint where the source's training
    # held it to its end, so that its trees keep the pieces this run's constraint keeps.
    side = held_at_end(source.training)

    def brackets_of(sentences: list[list[str]], barred: list[list[int]] | None = None
                    ) -> tuple[list[list[tuple[int, int]]], str]:
        todo = [i for i, s in enumerate(sentences) if len(s) <= longest]
        pieced = side is not None and barred is not None and any(barred)

        def parse(group, pieces):
            return consensus(grammars, group, pieces=pieces) if len(grammars) >= 2 \
                else decode(grammars[0], group, "mbr", pieces=pieces, tree_logprobs=False)

        def voter(grammar):
            return lambda group, pieces: decode(grammar, group, "mbr", pieces=pieces,
                                                tree_logprobs=False)

        # The brackets of each sentence's tree: the consensus (or the one grammar's mbr tree),
        # or with an agreement each restart's mbr tree that parses it, which then vote.
        votes: list[list[list[tuple[int, int]]]] = [[] for _ in sentences]
        with terminal_progress(len(todo) * (1 if agreement is None else len(grammars)),
                               "brackets") as progress:
            for start in range(0, len(todo), BRACKET_CHUNK):
                part = todo[start:start + BRACKET_CHUNK]
                group = [sentences[i] for i in part]
                group_pieces = (side, [barred[i] for i in part]) if pieced else None
                for run in [parse] if agreement is None else [voter(g) for g in grammars]:
                    parsed, _ = under_pieces(run, group, group_pieces)
                    for i, d in zip(part, parsed):
                        if d.tree is not None:
                            votes[i].append(tree_brackets(d.tree))
                    progress.update(len(group))
        brackets = [[] if not v else v[0] if agreement is None else agreed_spans(v, agreement)
                    for v in votes]
        unparsed = sum(not votes[i] for i in todo)
        note = (f"partial brackets from {source.grammar_path} ({decoder}"
                + (f", under the word-piece constraint it held, host {side}" if pieced else "")
                + f"): {sum(map(len, brackets))} over {len(brackets)} sentences")
        if unparsed:
            note += f"; {unparsed} sentences without a parse train unconstrained"
        if len(todo) < len(sentences):
            note += (f"; {len(sentences) - len(todo)} sentences over the memory budget's "
                     f"length ({longest} words) not decoded (they do not train)")
        return brackets, note

    return brackets_of


def trainer(cfg: TrainConfig, run_dir: str | Path, resume: bool = False,
            stream: TextIO | None = None, config_source: str | None = None,
            world: LocalWorld | None = None, data: TrainData | None = None) -> Trainer:
    """A `Trainer` of `cfg` (data read from `cfg.data` unless given, with the brackets of
    `constraints.brackets_from`) with a `DevEvaluator`."""
    data = load_data(cfg, grammar_brackets(cfg)) if data is None else data
    return Trainer(cfg, run_dir, resume=resume, stream=stream, config_source=config_source,
                   world=world, data=data, dev=DevEvaluator(data, cfg))


def run(cfg: TrainConfig | None, run_dir: str | Path, resume: bool = False,
        stream: TextIO | None = None, config_source: str | None = None,
        world: LocalWorld | None = None, max_steps: int | None = None) -> RunResult | None:
    """Train (or, with `resume`, continue with the saved config) into `run_dir`; the result,
    or None when the session stopped first (Ctrl-C or `max_steps`, after a checkpoint)."""
    cfg = saved_config(run_dir) if resume else cfg
    return trainer(cfg, run_dir, resume, stream, config_source, world).run(max_steps)


def train(cfg: TrainConfig, run_dir: str | Path, stream: TextIO | None = None,
          config_source: str | None = None, world: LocalWorld | None = None) -> Trainer:
    """Train a fresh run into `run_dir` and return the fitted Trainer (`world`: this
    process's data-parallel group, see train.distributed; default one process)."""
    fitted = trainer(cfg, run_dir, stream=stream, config_source=config_source, world=world)
    fitted.run()
    return fitted


def resume(run_dir: str | Path, stream: TextIO | None = None, max_steps: int | None = None,
           world: LocalWorld | None = None) -> tuple[Trainer, RunResult | None]:
    """Continue the run in `run_dir` from its checkpoint (config taken from the checkpoint),
    with any number of workers (`world`)."""
    fitted = trainer(saved_config(run_dir), run_dir, resume=True, stream=stream, world=world)
    return fitted, fitted.run(max_steps)


@dataclass
class Fit:
    """What `fit` returns: the result grammar, the run's record and the fitted trainer."""
    grammar: Grammar
    result: RunResult
    trainer: Trainer


def fit(sentences: Sequence[Sequence[str]], cfg: TrainConfig,
        dev: Sequence[Sequence[str]] | None = None, dev_trees: Sequence[Tree] | None = None,
        run_dir: str | Path | None = None, stream: TextIO | None = None) -> Fit:
    """Induce a grammar from token lists in memory, as `train` does from the files of
    `cfg.data` (the reading options of `cfg.data` apply: lowercasing, length cap, vocabulary).
    `dev`: dev token lists, or `dev_trees`: gold dev trees (their leaves are the sentences).
    The run folder is `run_dir`, or a temporary folder removed afterwards."""
    data = data_from_sentences(cfg, sentences, dev, dev_trees, grammar_brackets(cfg))
    if run_dir is not None:
        return _fit(cfg, data, Path(run_dir), stream)
    with tempfile.TemporaryDirectory(prefix="treewright-fit-") as folder:
        return _fit(cfg, data, Path(folder) / "run", stream)


def _fit(cfg: TrainConfig, data: TrainData, run_dir: Path, stream: TextIO | None) -> Fit:
    fitted = trainer(cfg, run_dir, stream=stream, data=data)
    result = fitted.run()
    return Fit(load_grammar(result.grammar_path), result, fitted)


@dataclass
class LexicalizedRun:
    """A trained lexicalized model (`params.lexicalized`) read back from its run folder."""
    model: LexicalizedParams
    vocab: object          # the training `Vocabulary`
    nonterminals: list[str]
    preterminals: list[str]

    def parse(self, sentences: Sequence[Sequence[str]], batch_size: int = 16,
              pieces=None) -> list[HeadedParse]:
        """Trees with the head of every word (`decode.decode_heads`, under the word-piece
        constraint with `pieces`). The words are read as the model's training vocabulary has
        them: apply the training corpus's reading options (lowercasing, case rules) first."""
        return decode_heads(self.model, self.vocab, sentences, self.nonterminals,
                            self.preterminals, batch_size, pieces)


def load_lexicalized(run_dir: str | Path) -> LexicalizedRun:
    """The lexicalized model of a finished training run: its parameters from the checkpoint,
    its vocabulary rebuilt by reading the training corpus again as the saved config says (so
    that corpus must still be where the config points). InputError when the run trained
    another parameterization, or kept a restart other than the last one (the checkpoint holds
    the last restart's model only)."""
    if not Path(run_dir).is_dir():
        raise InputError("a lexicalized model is read from its training run folder; this is "
                         "not a folder (a grammar file's rules carry no head words)",
                         path=str(run_dir))
    folder = RunFolder(run_dir, "train")
    cfg = saved_config(run_dir)
    if cfg.model.parameterization != "lexicalized":
        raise InputError(f"the run trained the {cfg.model.parameterization} parameterization, "
                         "not lexicalized", path=str(folder.checkpoint))
    if folder.result.exists():
        kept = json.loads(folder.result.read_text())["best_restart"]
        if kept != cfg.train.restarts - 1:
            raise InputError(f"the run kept restart {kept}, but the checkpoint holds restart "
                             f"{cfg.train.restarts - 1}; retrain with train.restarts=1 to "
                             "parse with heads", path=str(folder.result))
    # Only the vocabulary is wanted: the brackets a staged run trained with are not decoded again.
    unstaged = dataclasses.replace(cfg, constraints=dataclasses.replace(
        cfg.constraints, brackets_from=None, brackets_epochs=None))
    vocab = load_data(unstaged).vocab
    tensors, _ = load_checkpoint(folder.checkpoint)
    model = LexicalizedParams.from_options(cfg.model, len(vocab), None, _dtype(cfg))
    model.load_state_dict({k[6:]: v for k, v in tensors.items() if k.startswith("model.")})
    nonterminals, preterminals = symbol_names(cfg.model.nonterminals, cfg.model.preterminals)
    return LexicalizedRun(model, vocab, nonterminals, preterminals)


FACTORED = ("independent", "independent-neural", "lowrank")  # rules with no (NT, S, S) tensor


@dataclass
class FactoredRun:
    """A training run's factored rules (`params.IndependentRules` or `params.LowRankRules`),
    their vocabulary and symbol names, as `decode.decode_factored` takes them."""
    rules: object
    vocab: object          # the training `Vocabulary`
    nonterminals: list[str]
    preterminals: list[str]

    def parse(self, sentences: Sequence[Sequence[str]], batch_size: int = 16,
              decoder: str = "mbr") -> list:
        """`decode.decode_factored` with `decoder`, mbr or max-rule-product."""
        from treewright.decode import decode_factored
        return decode_factored(self.rules, self.vocab, self.nonterminals, self.preterminals,
                               sentences, batch_size, decoder)


def load_factored(run_dir: str | Path) -> FactoredRun | None:
    """The rules of a finished training run of a factored parameterization (`FACTORED`), from
    its checkpoint, with its vocabulary rebuilt by reading the training corpus again as the
    saved config says: for decoding through the factored engine, without the (NT, S, S) rule
    tensor that its grammar file loads into (1,024 nonterminals and 2,048 preterminals: 9.7
    billion entries). None when `run_dir` is not a finished run's folder, its run trained other
    rules, or the run kept a restart other than the last (the checkpoint holds the last restart's model
    only): the grammar file is what is read then."""
    if not Path(run_dir).is_dir():
        return None
    folder = RunFolder(run_dir, "train")
    if not (folder.config.is_file() and folder.checkpoint.is_file() and folder.result.is_file()):
        return None   # not a finished run: the grammar file's reader says what is missing
    cfg = saved_config(run_dir)
    if cfg.model.parameterization not in FACTORED:
        return None
    if json.loads(folder.result.read_text())["best_restart"] != cfg.train.restarts - 1:
        return None
    unstaged = dataclasses.replace(cfg, constraints=dataclasses.replace(
        cfg.constraints, brackets_from=None, brackets_epochs=None))
    try:
        vocab = load_data(unstaged).vocab
    except InputError as err:
        raise InputError(f"{err.reason} (a run of factored rules is read as its model, whose "
                         "vocabulary is its training corpus read again; give the run's "
                         f"{GRAMMAR} instead of the folder to use the rules of that file)",
                         path=err.path, line=err.line) from None
    tensors, _ = load_checkpoint(folder.checkpoint)
    model = PARAMETERIZATIONS[cfg.model.parameterization].from_options(
        cfg.model, len(vocab), None, _dtype(cfg))
    model.load_state_dict({k[6:]: v for k, v in tensors.items() if k.startswith("model.")})
    with torch.no_grad():
        rules = model.rules()
    nonterminals, preterminals = symbol_names(cfg.model.nonterminals, cfg.model.preterminals)
    return FactoredRun(rules, vocab, nonterminals, preterminals)


def lexical_summary_of(run_dir: str | Path, top: int = DEFAULT_PAIRS,
                       rename: dict[str, str] | None = None) -> LexicalSummary | None:
    """What the lexicalized model of the run in `run_dir` learned about words (`top` pairs of
    each kind, `export.lexical.lexical_summary`; symbols renamed by `rename`, old name to new,
    as `export.load_renaming` gives it); None when `run_dir` is a grammar file or its
    run trained another parameterization (by its config.yaml). InputError, as
    `load_lexicalized`, when the model cannot be read back."""
    if not Path(run_dir).is_dir():
        return None
    config = read_training_record(Path(run_dir))["config"]
    model = config.get("model") if isinstance(config, dict) else None
    if not isinstance(model, dict) or model.get("parameterization") != "lexicalized":
        return None
    run = load_lexicalized(run_dir)
    names = [(rename or {}).get(n, n) for n in run.nonterminals + run.preterminals]
    nt = len(run.nonterminals)
    return lexical_summary(run.model, run.vocab.words, names[:nt], names[nt:], top)
