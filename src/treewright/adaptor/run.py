"""A word-segmentation run into a run folder (`treewright segment`): the unigram word
adaptor grammar over a file of utterances, sampled for `sampler.sweeps` sweeps, with metrics,
checkpoints and a resume that continues bit for bit.

Files (names from `runfolder.RunFolder`, kind "segment"): config.yaml, segment.log,
metrics.jsonl (per scored sweep: log_joint, the log probability of chain 0's trees and seating,
which is the log posterior up to a constant; accept_rate of the sweep's proposals; the sweep's
temperature; Word's discount and concentration; cached_words; with gold, token_f1 and
boundary_f1), chains.json (the checkpoint: the chains' JSON state and the size metrics.jsonl
had then), and at the end segmentation.txt (chain 0's words, one utterance per line, in file
order without the blank lines) and lexicon.tsv (Word's cached subtrees: characters,
customers, tables).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

from treewright.adaptor.config import SegmentConfig, load_segment_config
from treewright.adaptor.grammars import unigram_word_grammar
from treewright.adaptor.sampler import AdaptorSampler, annealing
from treewright.adaptor.segment import Utterances, read_utterances
from treewright.config import dump_config_yaml
from treewright.errors import InputError
from treewright.evaluation.segmentation import SegmentationScores, evaluate_segmentation
from treewright.runfolder import RunFolder
from treewright.safeio import atomic_write_text
from treewright.tracking import Progress

RUN_CHECKPOINT_KIND = "treewright segmentation run"
RUN_CHECKPOINT_VERSION = 1
WORD = "Word"  # the adapted symbol whose top-most subtrees are the words


@dataclass(frozen=True)
class SegmentResult:
    segmentation: Path
    lexicon: Path
    sweeps: int
    scores: SegmentationScores | None  # against the gold, when the config gives it


def segment_words(cfg: SegmentConfig, run_dir: str | Path, stream: TextIO | None = None,
                  config_source: str | None = None) -> SegmentResult:
    """Run the segmentation `cfg` describes into `run_dir` (created if needed)."""
    folder = RunFolder(run_dir, "segment")
    header = f"resolved config of treewright segment {config_source or ''}".rstrip()
    folder.start(resume=False, config_text=dump_config_yaml(cfg, header))
    corpus = _read(cfg, folder, stream)
    chars = [c for u in corpus.characters for c in u]
    if not chars:
        raise InputError("no utterances (the file is empty or blank)", path=str(cfg.data.text))
    grammar = unigram_word_grammar(chars, cfg.grammar.discount, cfg.grammar.concentration,
                                   cfg.grammar.more_words, cfg.grammar.more_characters)
    folder.note(f"initializing {cfg.sampler.chains} chain(s)", stream)
    sampler = AdaptorSampler(grammar, corpus.characters, chains=cfg.sampler.chains,
                             seed=cfg.sampler.seed, source=str(cfg.data.text))
    return _run(cfg, folder, corpus, sampler, stream, fresh=True)


def segment_resume(run_dir: str | Path, stream: TextIO | None = None) -> SegmentResult:
    """Continue the interrupted run in `run_dir` from its last checkpoint, with the config
    saved there; it ends in the state, outputs and metrics the uninterrupted run gives."""
    folder = RunFolder(run_dir, "segment")
    folder.start(resume=True)
    cfg = load_segment_config(folder.config)
    where = str(folder.checkpoint)
    try:
        state = json.loads(folder.checkpoint.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise InputError(f"not a JSON checkpoint ({err})", path=where) from None
    if not isinstance(state, dict) or state.get("kind") != RUN_CHECKPOINT_KIND \
            or state.get("version") != RUN_CHECKPOINT_VERSION:
        raise InputError(f"not a checkpoint of a segmentation run, version "
                         f"{RUN_CHECKPOINT_VERSION}", path=where)
    sampler = AdaptorSampler.from_state(state.get("chains"), source=where)
    corpus = _read(cfg, folder, stream)
    if corpus.characters != sampler.words:
        raise InputError("the utterances differ from those the checkpoint was sampled on",
                         path=str(cfg.data.text))
    # Metric lines written after the checkpoint belong to sweeps that will run again.
    folder.truncate_metrics(int(state.get("metrics_bytes", 0)))
    folder.note(f"resuming after sweep {sampler.chains[0].sweeps} of {cfg.sampler.sweeps}",
                stream)
    return _run(cfg, folder, corpus, sampler, stream, fresh=False)


def _read(cfg: SegmentConfig, folder: RunFolder, stream: TextIO | None) -> Utterances:
    corpus = read_utterances(cfg.data.text)
    folder.note(f"read {len(corpus.characters)} utterances from {cfg.data.text} "
                f"({corpus.blank} blank lines skipped)", stream)
    return corpus


def _run(cfg: SegmentConfig, folder: RunFolder, corpus: Utterances, sampler: AdaptorSampler,
         stream: TextIO | None, fresh: bool) -> SegmentResult:
    total = cfg.sampler.sweeps
    done = sampler.chains[0].sweeps
    temperature = annealing(cfg.sampler.anneal_from, cfg.sampler.anneal_sweeps)
    loggers = folder.open_loggers(cfg.output.stdout_metrics, tensorboard=False, stream=stream)
    try:
        if fresh:
            loggers.log(_metrics(cfg, corpus, sampler, None), step=0)
        with Progress(total - done, "sweeps", unit="sweeps") as progress:
            while done < total:
                chain = sampler.chains[0]
                before = (chain.proposed, chain.accepted)
                sampler.run(1, temperature=temperature,
                            hyperparameters=cfg.sampler.resample_hyperparameters)
                done += 1
                if done % cfg.sampler.score_every == 0 or done == total:
                    metrics = _metrics(cfg, corpus, sampler, before)
                    metrics["temperature"] = temperature(done - 1)
                    loggers.log(metrics, step=done)
                if done % cfg.sampler.checkpoint_every == 0 or done == total:
                    _checkpoint(folder, sampler)
                progress.update(1)
    finally:
        loggers.close()
    words = sampler.segmentations(WORD)
    atomic_write_text(folder.segmentation, "".join(" ".join(w) + "\n" for w in words))
    atomic_write_text(folder.lexicon, "".join(f"{text}\t{customers}\t{tables}\n" for
                                              text, customers, tables in sampler.lexicon(WORD)))
    scores = evaluate_segmentation(words, corpus.gold, str(cfg.data.text)) \
        if cfg.data.gold else None
    if scores is not None:
        folder.note(f"after {done} sweeps: token F1 {scores.tokens.f1:.3f}, boundary F1 "
                    f"{scores.boundaries.f1:.3f}", stream)
    folder.note(f"wrote {folder.segmentation} and {folder.lexicon}", stream)
    return SegmentResult(folder.segmentation, folder.lexicon, done, scores)


def _metrics(cfg: SegmentConfig, corpus: Utterances, sampler: AdaptorSampler,
             before: tuple[int, int] | None) -> dict[str, float]:
    """Chain 0's numbers now; `before` (proposed, accepted) as the sweep started."""
    chain = sampler.chains[0]
    word = sampler.rules.names.index(WORD)
    out = {"log_joint": chain.log_joint(), "cached_words": len(chain.cache.labels[word]),
           "discount": float(chain.rules.discount[word]),
           "concentration": float(chain.rules.concentration[word])}
    if before is not None:
        proposed = chain.proposed - before[0]
        out["accept_rate"] = (chain.accepted - before[1]) / proposed if proposed else 0.0
    if cfg.data.gold:
        scores = evaluate_segmentation(sampler.segmentations(WORD), corpus.gold,
                                       str(cfg.data.text))
        out["token_f1"] = scores.tokens.f1
        out["boundary_f1"] = scores.boundaries.f1
    return out


def _checkpoint(folder: RunFolder, sampler: AdaptorSampler) -> None:
    atomic_write_text(folder.checkpoint, json.dumps({
        "kind": RUN_CHECKPOINT_KIND, "version": RUN_CHECKPOINT_VERSION,
        "metrics_bytes": folder.metrics_size(), "chains": sampler.state()}) + "\n")
