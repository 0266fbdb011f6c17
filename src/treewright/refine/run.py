"""A refinement run: data in, N split-merge cycles, metrics, grammars and summaries out.

Run folder (`runfolder.RunFolder` of kind "refine", shared with training): config.yaml
(resolved), refine.log, metrics.jsonl, tensorboard/, coarse.pcfg (the unrefined start),
cycle-<c>.pcfg and summary-<c>.txt per cycle, and the result grammar.pcfg with summary.txt and
summary.json beside it. Each cycle shows its progress (EM iterations) on standard error.

After each reported cycle, refine.ckpt holds the latent grammar bit for bit, the random
generator's state and the metrics so far, so `refine_resume` continues an interrupted run to
exactly the grammar the uninterrupted run ends with: the data are read and prepared again the
same way (their coarse rules must match the checkpoint's), and the cycles after the last one
checkpointed run as they would have.
"""

from __future__ import annotations

import functools
import json
import math
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence, TextIO

import torch

from treewright.config import dump_config_yaml
from treewright.corpus import (ReadOptions, binarize, collapse_unary, read_corpus, split_indices,
                               treebank_form)
from treewright.errors import InputError
from treewright.grammar import available_bytes, parse_grammar
from treewright.refine.config import RefineConfig, load_refine_config
from treewright.refine.latent import LatentGrammar, latent_from_grammar, normalize
from treewright.refine.signatures import UNKNOWN, WordClasses
from treewright.refine.splitmerge import merge, merge_losses, merge_plan, smooth, split
from treewright.refine.summary import subcategory_summary, summary_text
from treewright.refine.text import text_estep, text_loglik
from treewright.refine.trees import TreeSet, cnf_problem, tree_estep, tree_loglik, tree_set
from treewright.runfolder import RunFolder
from treewright.safeio import atomic_write_text, load_checkpoint, save_checkpoint
from treewright.tracking import Progress
from treewright.trees import Tree
from treewright.vocab import Vocabulary


# A coarse parser: (latent grammar, sentences, decoder name) -> per sentence its best tree
# under the grammar by that decoder, labels projected to the coarse symbols (NAME·k -> NAME),
# still in CNF; None where the sentence has no parse. Decoding is a layer above refinement, so
# the caller hands one in (`treewright.refiner.coarse_trees` is the usual one).
CoarseParser = Callable[[LatentGrammar, Sequence[Sequence[str]], str], list]


# ---- preparing trees ------------------------------------------------------------------------

def cnf_tree(tree: Tree, factor: str = "right", horizontal: int | None = 1,
             vertical: int = 1) -> Tree:
    """Binarize (markovized) and collapse unary chains: the coarse tree form refinement uses.

    A chain ending in a tag joins the tag too, so a phrase over one tag becomes one preterminal,
    (NP (NAME x)) -> (NP¦NAME x) (`corpus.UNARY_SEP`): a grammar without unary rules has no
    other place for it. `from_coarse_trees` splits every joined label back into its chain."""
    return collapse_unary(binarize(tree, factor, horizontal, vertical), keep_preterminals=False)


def map_words(tree: Tree, classes: Callable[[str], str]) -> Tree:
    """A copy of `tree` with every word replaced by `classes(word)`."""
    stack = [(tree, Tree(tree.label))]
    top = stack[0][1]
    while stack:
        old, new = stack.pop()
        for child in old.children:
            if isinstance(child, Tree):
                copy = Tree(child.label)
                new.children.append(copy)
                stack.append((child, copy))
            else:
                new.children.append(classes(child))
    return top


def estimate_coarse(trees: Sequence[Tree], start: str = "ROOT") -> LatentGrammar:
    """The coarse maximum-likelihood grammar of CNF trees (count ratios), one subcategory per
    symbol. Uses the training layer's supervised estimator (relative frequencies)."""
    from treewright.train.supervised import estimate_from_trees
    return latent_from_grammar(estimate_from_trees(list(trees), start=start, unk=UNKNOWN))


def from_coarse_trees(tree: Tree) -> Tree:
    """Undo the CNF transforms of `cnf_tree` (labels already coarse): `corpus.treebank_form`,
    which `parse`, `export` and `report` apply to the trees they write too."""
    return treebank_form(tree)


# ---- one cycle --------------------------------------------------------------------------------

@dataclass
class CycleSettings:
    """One cycle's settings; the defaults are those of `refine.config.CycleConfig`."""
    em_iterations: int = 50
    smoothed_iterations: int = 5
    merge_fraction: float = 0.5
    perturbation: float = 0.01
    smooth_nonterminal: float = 0.01
    smooth_preterminal: float = 0.1


def em_on_trees(lg: LatentGrammar, ts: TreeSet, iterations: int,
                smoothing: tuple[float, float] | None = None,
                progress: Progress | None = None) -> tuple[LatentGrammar, list[float]]:
    """EM over the subcategories of fixed trees; returns the grammar and the training
    log-likelihood before each iteration's M-step (`progress` counts the iterations)."""
    history = []
    for _ in range(iterations):
        if progress is not None:
            progress.update()
        e = tree_estep(lg, ts)
        history.append(float(e.loglik.sum()))
        lg = normalize(lg, e.binary, e.lexical, e.root)
        if smoothing is not None:
            lg = smooth(lg, *smoothing)
    return lg, history


def tree_cycle(lg: LatentGrammar, ts: TreeSet, s: CycleSettings, generator: torch.Generator,
               progress: Progress | None = None) -> LatentGrammar:
    """One split-merge cycle on observed trees (Petrov et al. 2006): split, EM, merge, then EM
    with smoothing (`progress` counts the EM iterations)."""
    lg = split(lg, s.perturbation, generator)
    lg, _ = em_on_trees(lg, ts, s.em_iterations, progress=progress)
    e = tree_estep(lg, ts)
    lg = merge(lg, merge_plan(lg, merge_losses(lg, ts, e), s.merge_fraction), e)
    lg = smooth(lg, s.smooth_nonterminal, s.smooth_preterminal)
    lg, _ = em_on_trees(lg, ts, s.smoothed_iterations,
                        (s.smooth_nonterminal, s.smooth_preterminal), progress)
    return lg


def em_on_text(lg: LatentGrammar, ids, iterations: int, batch_size: int,
               smoothing: tuple[float, float] | None = None, progress: Progress | None = None):
    history = []
    for _ in range(iterations):
        if progress is not None:
            progress.update()
        e = text_estep(lg, ids, batch_size)
        history.append(e.loglik)
        lg = normalize(lg, e.binary, e.lexical, e.root)
        if smoothing is not None:
            lg = smooth(lg, *smoothing)
    return lg, history


def text_cycle(lg: LatentGrammar, ids, words, s: CycleSettings, generator: torch.Generator,
               batch_size: int = 32, progress: Progress | None = None, *,
               parser: CoarseParser) -> LatentGrammar:
    """One cycle from raw text. The merge losses are estimated on each sentence's most probable
    coarse tree (the paper's per-node estimate needs nodes; these stand in for the unseen
    trees; `parser` with the "viterbi" decoder finds them, and sentences with no parse are left
    out); the merged rules take the full inside-outside counts."""
    lg = split(lg, s.perturbation, generator)
    lg, _ = em_on_text(lg, ids, s.em_iterations, batch_size, progress=progress)
    trees = [t for t in parser(lg, words, "viterbi") if t is not None]
    ts = tree_set(lg, trees)
    losses = merge_losses(lg, ts, tree_estep(lg, ts))
    counts = text_estep(lg, ids, batch_size)
    lg = merge(lg, merge_plan(lg, losses, s.merge_fraction),
               counts=(counts.binary, counts.lexical, counts.root))
    lg = smooth(lg, s.smooth_nonterminal, s.smooth_preterminal)
    lg, _ = em_on_text(lg, ids, s.smoothed_iterations, batch_size,
                       (s.smooth_nonterminal, s.smooth_preterminal), progress)
    return lg


# ---- evaluation -------------------------------------------------------------------------------

def labeled_f1(pred: Sequence[Tree | None], gold: Sequence[Tree]) -> dict[str, float]:
    """Labeled bracket precision, recall and F1 (micro-averaged over the corpus) of phrase
    spans (width >= 2, preterminals excluded), counted as multisets of (start, end, label)
    (the usual labeled bracket score; common practice). A missing parse contributes no
    predicted brackets."""
    from collections import Counter

    match = n_pred = n_gold = 0
    for p, g in zip(pred, gold):
        gs = Counter(s for s in g.labeled_spans() if s[1] - s[0] >= 2)
        ps = Counter(s for s in p.labeled_spans() if s[1] - s[0] >= 2) if p is not None \
            else Counter()
        match += sum((gs & ps).values())
        n_pred += sum(ps.values())
        n_gold += sum(gs.values())
    precision = match / n_pred if n_pred else 0.0
    recall = match / n_gold if n_gold else 0.0
    f1 = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
    return {"precision": precision, "recall": recall, "f1": f1}


def parse_heldout(parser: CoarseParser, lg: LatentGrammar, words: Sequence[Sequence[str]],
                  decoder: str = "max-rule-product") -> list[Tree | None]:
    """Coarse trees of `words` with the CNF transforms undone, as labeled F1 compares them with
    the gold trees: `parser` with `decoder` (the coarse max-rule-product decoder, or "viterbi",
    the best fine tree with its labels projected)."""
    return [None if t is None else from_coarse_trees(t) for t in parser(lg, words, decoder)]


# ---- the run ----------------------------------------------------------------------------------

@dataclass
class RefineResult:
    grammar: LatentGrammar
    grammar_path: Path
    metrics: list[dict] = field(default_factory=list)


REFINE_CHECKPOINT_VERSION = 1
_GRAMMAR_TENSORS = ("rules", "words", "tops", "binary", "lexical", "root", "splits")


class _Log:
    """refine.log, echoed to `stream`."""

    def __init__(self, folder: RunFolder, stream: TextIO | None):
        self.folder = folder
        self.stream = stream

    def note(self, text: str) -> None:
        self.folder.note(text, self.stream)


def _read(path: Path, fmt: str, max_length: int | None,
          vocabulary: Vocabulary | None = None) -> tuple[list, str, Vocabulary]:
    """The sentences of a corpus, its read report on one line and the vocabulary the report
    counts against. With `vocabulary` (a grammar's, for the text start; the training corpus's,
    for the held-out corpus of the treebank start) the report's vocabulary and unknown-token
    rate are that vocabulary's, not the file's own words (against which nothing is unknown)."""
    corpus = read_corpus(path, fmt, ReadOptions(max_length=max_length, vocabulary=vocabulary))
    return corpus.sentences, corpus.report.format().replace("\n", "; "), corpus.vocabulary


def _held_out(cfg: RefineConfig, sentences: list, vocabulary: Vocabulary | None = None,
              whose: str = "the grammar's") -> tuple[list, list, str]:
    d = cfg.data
    if d.dev is not None:
        dev, report, _ = _read(d.dev, d.format, d.max_length, vocabulary)
        return sentences, dev, f"held-out corpus (vocabulary and unknown tokens: {whose}): " \
            f"{report}"
    parts = split_indices(len(sentences), dev=d.heldout_fraction, test=0.0, seed=cfg.refine.seed)
    return ([sentences[i] for i in parts.train], [sentences[i] for i in parts.dev],
            f"held out {len(parts.dev)} of {len(sentences)} training sentences "
            f"(fraction {d.heldout_fraction}, seed {cfg.refine.seed})")


def _reading_note(name: str, trees: Sequence[Tree], classes: WordClasses,
                  rare_count: int) -> str:
    """How the grammar of the treebank start reads the words of `trees`: as words of its
    own, as shape classes, or as the unknown word (training words seen at most `rare_count`
    times, and held-out words unseen in training, are not words of its own)."""
    tokens = [w for t in trees for w in t.leaves()]
    read = Counter("word" if m == w else "unknown" if m == UNKNOWN else "class"
                   for w, m in ((w, classes(w)) for w in tokens))
    total = max(len(tokens), 1)
    return (f"{name} tokens read by the grammar: {read['word']} of {len(tokens)} as words of its "
            f"own, {read['class']} ({read['class'] / total:.2%}) as their shape class and "
            f"{read['unknown']} ({read['unknown'] / total:.2%}) as {UNKNOWN} (words seen in "
            f"training at most data.rare_count = {rare_count} times are not its own)")


# More than this share of a text's tokens missing from the grammar's vocabulary draws a warning.
UNKNOWN_WARNING = 0.5


def _warn_unknown(log: _Log, name: str, source, sentences, vocab: Vocabulary,
                  grammar: Path) -> None:
    """Warn in the log when most tokens of `sentences` are words the grammar lacks."""
    tokens = [t for s in sentences for t in s.tokens]
    # As the read report counts them: a literal unknown word in the text is unknown too.
    missing = sum(t not in vocab or t == vocab.unk for t in tokens)
    if tokens and missing / len(tokens) > UNKNOWN_WARNING:
        fate = f"read as its unknown word {vocab.unk}, so refinement cannot tell them apart" \
            if vocab.unk is not None else \
            "and it has no unknown word, so their sentences have no parse"
        log.note(f"warning: {missing} of the {len(tokens)} {name} tokens of {source} "
                 f"({100 * missing / len(tokens):.2f}%) are not words of the grammar "
                 f"{grammar}, {fate} (is this the text the grammar was trained on?)")


def _unseen_as_unknown(log: _Log, words: list[list[str]], train_words: list[list[str]],
                       vocab: Vocabulary) -> tuple[list[list[int]], bool]:
    """The vocabulary ids of the text start's held-out sentences `words`, with each grammar word
    that no training sentence holds read as the grammar's unknown word, and notes in the log;
    and whether there was such a word (then the starting grammar most likely saw `words`).

    Refinement re-estimates the lexicon from the training sentences alone, so such a word (the
    grammar had it from text that included the held-out part) ends with no probability, and the
    saved grammar no longer lists it: new text reads it as the unknown word. Held out as it
    was, its sentence would have no parse and drop out of the held-out likelihood. Such words
    also say that the starting grammar most likely saw the held-out sentences, which the log
    says too: its held-out figures then flatter it."""
    seen = {w for sentence in train_words for w in sentence}
    unseen = Counter(w for s in words for w in s
                     if w in vocab and w not in seen and w != vocab.unk)
    if not unseen:
        return [vocab.encode(s) for s in words], False
    tokens = sum(unseen.values())
    total = sum(map(len, words))
    found = (f"held-out: {tokens} of {total} tokens ({len(unseen)} types) are words of the "
             f"grammar that no training sentence holds; refinement gives them no probability")
    if vocab.unk is None:
        lost = sum(any(w in unseen for w in s) for s in words)
        log.note(f"{found} and the grammar has no unknown word, so the {lost} held-out "
                 f"sentences that hold them have no parse")
        ids = [vocab.encode(s) for s in words]
    else:
        log.note(f"{found}, so they are read as {vocab.unk}, as the refined grammar reads new "
                 f"words")
        ids = [vocab.encode([vocab.unk if w in unseen else w for w in s]) for s in words]
    log.note("held-out: the grammar learned those words from text beyond the training "
             "sentences, most likely these held-out ones. If so, the held-out figures of cycle 0 "
             "(the starting grammar) are not held-out figures, and the cycles after it, which "
             "learn from the training sentences alone, compare worse with them than they would "
             "on new text. Held-out text that the starting grammar did not see (data.dev) "
             "compares them fairly; the verdict at the end compares the cycles after it only")
    return ids, True


def _subcategory_counts(lg: LatentGrammar) -> dict[str, int]:
    return {f"subcategories/{s}": int(n) for s, n in zip(lg.symbols, lg.splits.tolist())}


# A held-out parser: (latent grammar, held-out sentences) -> their coarse trees (None: no
# parse). The treebank start scores them by labeled F1 after each cycle (output.parse_f1).
HeldoutParser = Callable[[LatentGrammar, Sequence[Sequence[str]]], list]


def refine(cfg: RefineConfig, run_dir: str | Path, stream: TextIO | None = None,
           config_source: str | None = None,
           heldout_parser: HeldoutParser | None = None, *,
           parser: CoarseParser) -> RefineResult:
    """Run the refinement `cfg` describes into `run_dir` (created if needed). `parser` finds
    the text start's trees for the merge step and, unless `heldout_parser` is given (the
    caller's held-out parser for labeled F1), the held-out trees (`parse_heldout` with
    `output.f1_decoder`). `treewright.refiner.refine` supplies the usual parser."""
    folder = RunFolder(run_dir, "refine")
    header = f"resolved config of treewright refine {config_source or ''}".rstrip()
    folder.start(resume=False, config_text=dump_config_yaml(cfg, header))
    return _refine(cfg, folder, stream, None, heldout_parser, parser)


def refine_resume(run_dir: str | Path, stream: TextIO | None = None,
                  heldout_parser: HeldoutParser | None = None, *,
                  parser: CoarseParser) -> RefineResult:
    """Continue the interrupted refinement in `run_dir` from its last checkpointed cycle, with
    the config saved there; it ends with the grammar the uninterrupted run gives. `parser`
    and `heldout_parser` as in `refine`."""
    folder = RunFolder(run_dir, "refine")
    folder.start(resume=True)
    tensors, meta = load_checkpoint(folder.checkpoint)
    if meta.get("version") != REFINE_CHECKPOINT_VERSION:
        raise InputError(f"refinement checkpoint version {meta.get('version')} is not "
                         f"{REFINE_CHECKPOINT_VERSION}", path=str(folder.checkpoint))
    cfg = load_refine_config(folder.config)
    # Metrics logged after the checkpoint belong to a cycle that will run again.
    folder.truncate_metrics(meta["metrics_bytes"])
    return _refine(cfg, folder, stream, (tensors, meta), heldout_parser, parser)


def _refine(cfg: RefineConfig, folder: RunFolder, stream: TextIO | None, state,
            heldout_parser: HeldoutParser | None, parser: CoarseParser) -> RefineResult:
    log = _Log(folder, stream)
    if state is not None:
        log.note(f"resuming after cycle {state[1]['cycle']} of {cfg.refine.cycles}")
    loggers = folder.open_loggers(cfg.output.stdout_metrics, cfg.output.tensorboard, stream)
    try:
        if cfg.data.start == "treebank":
            if heldout_parser is None:
                heldout_parser = functools.partial(parse_heldout, parser,
                                                   decoder=cfg.output.f1_decoder)
            return _refine_treebank(cfg, folder, log, loggers, state, heldout_parser)
        return _refine_text(cfg, folder, log, loggers, state, parser)
    finally:
        loggers.close()


def _checkpoint(folder: RunFolder, lg: LatentGrammar, generator: torch.Generator, cycle: int,
                result: RefineResult) -> None:
    """refine.ckpt: what `_run_cycles` needs to go on after `cycle` (see the module docstring)."""
    tensors = {name: getattr(lg, name) for name in _GRAMMAR_TENSORS}
    tensors["generator"] = generator.get_state()
    save_checkpoint(folder.checkpoint, tensors, {
        "version": REFINE_CHECKPOINT_VERSION, "cycle": cycle, "symbols": lg.symbols,
        "metrics": result.metrics, "metrics_bytes": folder.metrics_size()})


def _restore(lg: LatentGrammar, generator: torch.Generator, state, folder: RunFolder,
             result: RefineResult) -> tuple[LatentGrammar, int]:
    """The checkpoint's latent grammar on the structure `lg` rebuilt from the data, and the
    first cycle still to run; the generator and the metrics so far are set back too."""
    tensors, meta = state
    where = str(folder.checkpoint)
    same = meta["symbols"] == lg.symbols and all(
        torch.equal(tensors[name], getattr(lg, name)) for name in ("rules", "words", "tops"))
    if not same:
        raise InputError("the training data no longer give the coarse grammar this checkpoint "
                         "was made from (a corpus file or data option changed since)",
                         path=where)
    generator.set_state(tensors["generator"])
    result.metrics = list(meta["metrics"])
    restored = lg.with_params(tensors["binary"], tensors["lexical"], tensors["root"],
                              tensors["splits"])
    return restored, int(meta["cycle"]) + 1


def _run_cycles(cfg: RefineConfig, lg: LatentGrammar, cycle_step, report_cycle,
                folder: RunFolder, log: _Log, result: RefineResult, generator: torch.Generator,
                state, compare_from: int = 0) -> RefineResult:
    """Report the unrefined grammar, then run and report each split-merge cycle, with a
    checkpoint after each report; both starting points share this, and differ only in
    `cycle_step` (one cycle on trees or on text, counting its EM iterations on the progress
    line it is given). With `state` (a loaded checkpoint) it goes on after the checkpoint's
    cycle instead. The log's last word on the held-out figures compares cycles from
    `compare_from` on (`_heldout_course`)."""
    if state is None:
        report_cycle(0, lg, 0.0)
        _checkpoint(folder, lg, generator, 0, result)
        first = 1
    else:
        lg, first = _restore(lg, generator, state, folder, result)
    iterations = cfg.refine.em_iterations + cfg.refine.smoothed_iterations
    for cycle in range(first, cfg.refine.cycles + 1):
        _check_room(lg, cycle, cfg.refine.cycles, folder, log, result)
        began = time.perf_counter()
        with Progress(iterations, f"cycle {cycle} of {cfg.refine.cycles}",
                      unit="EM iterations") as progress:
            lg = cycle_step(lg, progress)
        seconds = time.perf_counter() - began
        _save(lg, folder.cycle_grammar(cycle))
        report_cycle(cycle, lg, seconds)
        _checkpoint(folder, lg, generator, cycle, result)
    result.grammar = lg
    _save(lg, folder.grammar)
    log.note(_heldout_course(result.metrics, folder, compare_from))
    log.note(f"refined grammar: {result.grammar_path}")
    return result


def _heldout_course(metrics: Sequence[dict], folder: RunFolder, compare_from: int = 0
                    ) -> str | None:
    """The held-out log-likelihood per word of every cycle so far on one line, and when the
    last cycle's is not the best of the cycles from `compare_from` on, which cycle's grammar
    file had the best: a refined grammar can fit its training sentences better with every cycle
    and new text worse (EM with no prior goes on fitting the training sentences' sparse
    counts). None when no cycle has a finite figure."""
    # A resumed run's metrics come back from the checkpoint, where nan is the string "nan".
    figures = [(int(m["cycle"]), float(m.get("heldout/loglik_per_word", "nan")))
               for m in metrics]
    scored = [(c, ll) for c, ll in figures if math.isfinite(ll)]
    if not scored:
        return None
    course = ", ".join(f"{c} {ll:.3f}" for c, ll in scored)
    text = f"held-out log-likelihood per word by cycle: {course}"
    compared = [(c, ll) for c, ll in scored if c >= compare_from]
    if not compared:
        return text
    best, best_ll = max(compared, key=lambda c: (c[1], -c[0]))   # the earliest of equal ones
    among = "" if compare_from == 0 else f" of the cycles from {compare_from} on"
    if compared[-1][1] >= best_ll:
        return f"{text}; the last is the best{among}"
    path = folder.coarse if best == 0 else folder.cycle_grammar(best)
    return (f"{text}. The refined grammar fits the held-out sentences worse than cycle "
            f"{best}'s did, by {best_ll - compared[-1][1]:.3f} nats a word: it has fitted its "
            f"training sentences past what carries over to new text. By this measure {path} "
            f"is the better grammar for new text")


# A cycle holds its coarse rules' blocks, split to twice the width, about this many times at
# once (the split, EM's expected counts, the merge, smoothing). Measured 2026-12-05: a 4-cycle
# run from raw Turkish text (46,596 coarse rules, 2,139 sentences) peaked at 9.67 GiB resident,
# 6.8 times the 1.42 GiB of its last cycle's blocks (G = 16; the process's other memory
# included); its next cycle, G = 32, was killed by the system at 24 GiB.
CYCLE_BLOCK_COPIES = 7


def _check_room(lg: LatentGrammar, cycle: int, cycles: int, folder: RunFolder, log: _Log,
                result: RefineResult) -> None:
    """Before cycle `cycle`: when its rule blocks, `lg`'s coarse rules over twice its width of
    subcategory slots held `CYCLE_BLOCK_COPIES` times, need more memory than the system has
    free, save `lg` as the refined grammar and raise InputError, rather than let the system
    stop the run for want of memory part way through the cycle."""
    rules, width = lg.binary.shape[0], 2 * lg.width
    block = rules * width ** 3 * lg.binary.element_size()
    need, free = CYCLE_BLOCK_COPIES * block, available_bytes()
    if free is None or need <= free:
        return
    result.grammar = lg
    _save(lg, folder.grammar)
    message = (f"cycle {cycle} of {cycles} would hold its {rules:,} coarse rules over "
               f"{width}**3 subcategory slots each, {block / 2 ** 30:,.1f} GiB a copy and about "
               f"{need / 2 ** 30:,.1f} GiB in all, and this machine has {free / 2 ** 30:,.1f} "
               f"GiB free. The refined grammar is that of cycle {cycle - 1} "
               f"({folder.grammar}). Fewer coarse rules (a starting grammar without its least "
               f"probable rules) or fewer cycles fit")
    log.note(f"stopped: {message}")
    raise InputError(message)


def _settings(cfg: RefineConfig) -> CycleSettings:
    r = cfg.refine
    return CycleSettings(r.em_iterations, r.smoothed_iterations, r.merge_fraction,
                         r.perturbation, r.smooth_nonterminal, r.smooth_preterminal)


def _save(lg: LatentGrammar, path: Path) -> Path:
    lg.to_grammar(torch.float64).save(path)
    return path


def _write_summary(lg, usage, folder: RunFolder, stem: str, top: int) -> None:
    summary = subcategory_summary(lg, usage, top)
    atomic_write_text(folder.summary(stem, ".txt"), summary_text(summary))
    atomic_write_text(folder.summary(stem, ".json"),
                      json.dumps(summary, indent=1, ensure_ascii=False) + "\n")


def _refine_treebank(cfg: RefineConfig, folder: RunFolder, log: _Log, loggers, state,
                     heldout_parser: HeldoutParser) -> RefineResult:
    d, form = cfg.data, cfg.tree_form
    sentences, report, vocab = _read(d.train, d.format, d.max_length)
    log.note(f"training corpus: {report}")
    if any(s.tree is None for s in sentences):
        raise InputError("the treebank start needs trees (bracketed trees or CoNLL-U)",
                         path=str(d.train))
    train, dev, note = _held_out(cfg, sentences, vocab, "the training corpus's")
    log.note(note)

    def usable(part: list, name: str) -> list[Tree]:
        trees, one_word = [], 0
        for s in part:
            t = cnf_tree(s.tree, form.factor, form.horizontal, form.vertical)
            problem = cnf_problem(t)
            if problem is not None:
                raise InputError(problem, path=s.source, line=s.line)
            if t.is_preterminal():
                one_word += 1  # a one-word tree has no phrase for the root to rewrite to
            else:
                trees.append(t)
        if one_word:
            log.note(f"{name}: {one_word} one-word sentences set aside (no phrase node)")
        return trees

    train_trees, dev_trees = usable(train, "training"), usable(dev, "held-out")
    classes = WordClasses.fit((w for t in train_trees for w in t.leaves()), d.rare_count,
                              d.signature_min_count)
    train_mapped = [map_words(t, classes) for t in train_trees]
    dev_mapped = [map_words(t, classes) for t in dev_trees]
    lg = estimate_coarse(train_mapped)
    lg.vocab.shapes = classes.scheme  # saved grammars read unseen words as training did
    log.note(f"coarse grammar: {len(lg.symbols)} symbols, {len(lg.rules)} binary and "
             f"{len(lg.words)} word rules; {len(classes.known)} known words, "
             f"{len(classes.signatures)} shape classes")
    for name, trees in (("training", train_trees), ("held-out", dev_trees)):
        log.note(_reading_note(name, trees, classes, d.rare_count))
    ts_train = tree_set(lg, train_mapped)
    ts_dev = tree_set(lg, dev_mapped)
    if ts_dev.dropped:
        log.note(f"held-out: {len(ts_dev.dropped)} of {len(dev_mapped)} trees use a coarse rule "
                 f"unseen in training and are left out of the held-out likelihood, e.g. "
                 f"tree {ts_dev.dropped[0][0] + 1}: {ts_dev.dropped[0][1]}"
                 + ("; none is left, so the held-out likelihood is not computed (nan in "
                    "metrics.jsonl)" if not ts_dev.num_trees else ""))
    f1_count = min(len(dev_trees), cfg.output.f1_max_sentences or len(dev_trees))
    f1_words = [t.leaves() for t in dev_mapped[:f1_count]]
    f1_gold = [from_coarse_trees(t) for t in dev_mapped[:f1_count]]
    settings = _settings(cfg)
    generator = torch.Generator().manual_seed(cfg.refine.seed)
    result = RefineResult(lg, folder.grammar)
    _save(lg, folder.coarse)

    def report_cycle(cycle: int, lg: LatentGrammar, seconds: float) -> None:
        e = tree_estep(lg, ts_train)
        dev_ll = float(tree_loglik(lg, ts_dev).sum()) if ts_dev.num_trees else float("nan")
        metrics: dict = {"cycle": cycle, "fine_symbols": lg.num_fine(),
                         "train/loglik": float(e.loglik.sum()),
                         "train/loglik_per_word": float(e.loglik.sum()) / ts_train.words,
                         "heldout/loglik": dev_ll,
                         "heldout/loglik_per_word": dev_ll / max(ts_dev.words, 1),
                         "heldout/trees": ts_dev.num_trees,
                         "heldout/trees_left_out": len(ts_dev.dropped),
                         "seconds": seconds}
        if cfg.output.parse_f1 and f1_words:
            try:
                predicted = heldout_parser(lg, f1_words)
            except InputError as err:  # a decoder that cannot take this grammar
                log.note(f"cycle {cycle}: held-out labeled F1 not measured: {err}")
            else:
                scores = labeled_f1(predicted, f1_gold)
                metrics.update({f"heldout/labeled_{k}": v for k, v in scores.items()})
        metrics.update(_subcategory_counts(lg))
        loggers.log(metrics, cycle)
        result.metrics.append(metrics)
        usage = torch.zeros(len(lg.symbols), lg.width, dtype=e.inside.dtype)
        usage.index_add_(0, ts_train.symbol, e.inside * e.outside)
        stem = "summary" if cycle == cfg.refine.cycles else f"summary-{cycle}"
        _write_summary(lg, usage, folder, stem, cfg.output.summary_top)

    return _run_cycles(cfg, lg, lambda g, progress: tree_cycle(g, ts_train, settings,
                                                               generator, progress),
                       report_cycle, folder, log, result, generator, state)


def _refine_text(cfg: RefineConfig, folder: RunFolder, log: _Log, loggers, state,
                 parser: CoarseParser) -> RefineResult:
    d = cfg.data
    assert d.grammar is not None
    path = Path(d.grammar)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("no such grammar file", path=str(path)) from None
    lg = latent_from_grammar(parse_grammar(text, source=str(path)))
    vocab = lg.vocab
    # Read against the grammar's vocabulary: the unknown-token rate is then the share of
    # tokens the grammar lacks (read as its unknown word), not 0 against the text's own words.
    sentences, report, _ = _read(d.train, d.format, d.max_length, vocab)
    log.note(f"training corpus (vocabulary and unknown tokens: the grammar's): {report}")
    _warn_unknown(log, "training", d.train, sentences, vocab, path)
    train, dev, note = _held_out(cfg, sentences, vocab)
    log.note(note)
    if d.dev is not None:
        _warn_unknown(log, "held-out", d.dev, dev, vocab, path)

    def as_words(part) -> tuple[list[list[str]], list[list[int]]]:
        words = [[w if w in vocab else (vocab.unk or w) for w in s.tokens] for s in part]
        return words, [vocab.encode(w) for w in words]

    train_words, train_ids = as_words(train)
    dev_ids, start_saw_dev = _unseen_as_unknown(log, as_words(dev)[0], train_words, vocab)
    n_train_words = sum(map(len, train_ids))
    settings = _settings(cfg)
    generator = torch.Generator().manual_seed(cfg.refine.seed)
    result = RefineResult(lg, folder.grammar)
    _save(lg, folder.coarse)

    def report_cycle(cycle: int, lg: LatentGrammar, seconds: float) -> None:
        e = text_estep(lg, train_ids, cfg.refine.batch_size)
        dev_ll, dev_unparsed, dev_words = text_loglik(lg, dev_ids, cfg.refine.batch_size)
        metrics: dict = {"cycle": cycle, "fine_symbols": lg.num_fine(),
                         "train/loglik": e.loglik,
                         "train/loglik_per_word": e.loglik / max(n_train_words, 1),
                         "train/unparsed": e.unparsed,
                         "heldout/loglik": dev_ll,
                         "heldout/loglik_per_word": dev_ll / max(dev_words, 1),
                         "heldout/unparsed": dev_unparsed, "seconds": seconds}
        metrics.update(_subcategory_counts(lg))
        loggers.log(metrics, cycle)
        result.metrics.append(metrics)
        usage = lg.lhs_totals(e.binary, e.lexical)
        stem = "summary" if cycle == cfg.refine.cycles else f"summary-{cycle}"
        _write_summary(lg, usage, folder, stem, cfg.output.summary_top)

    return _run_cycles(cfg, lg, lambda g, progress: text_cycle(
                           g, train_ids, train_words, settings, generator,
                           cfg.refine.batch_size, progress, parser=parser),
                       report_cycle, folder, log, result, generator, state,
                       compare_from=1 if start_saw_dev else 0)
