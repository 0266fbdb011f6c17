"""A word-segmentation run into a run folder (`treewright segment`): the unigram word
adaptor grammar over a file of utterances, sampled for `sampler.sweeps` sweeps, with metrics,
checkpoints and a resume that continues bit for bit.

Files (names from `runfolder.RunFolder`, kind "segment"): config.yaml, segment.log,
metrics.jsonl and, with output.tensorboard, the same numbers as TensorBoard scalars (per
scored sweep: log_joint, the log probability of the reported chain's trees and seating,
which is the log posterior up to a constant; accept_rate of that chain's proposals in the
sweep; the sweep's temperature; Word's discount and concentration; cached_words; with gold,
token_f1 and boundary_f1; and with two or more chains, chain, the reported chain's number, and
log_joint_chain{c} for every chain c), chains.json (the checkpoint: the chains' JSON state,
the boundary counts so far and the size metrics.jsonl had then), and at the end
segmentation.txt (one utterance per line, in file order without the blank lines, its words
separated by spaces) and lexicon.tsv (the reported chain's cached Word subtrees: characters,
customers, tables).

The reported chain is the one with the highest log joint probability when the numbers are
taken (the first on ties): a chain that has settled in a better mode of the posterior, chosen
by the model alone, never by the gold. With one chain it is chain 0. The segmentation pools
every chain: each chain's analyses are recorded after the last `sampler.samples` sweeps
`sampler.sample_every` apart, and a position is cut when more than half of them cut it, or
with `sampler.cut_rule: expected-f1` when as many cut it as the threshold with the highest
expected boundary F1 asks (`posterior.BoundaryTally`); with `sampler.samples: 0` it is the
reported chain's last state.

With grammar.unit morphs each input is one word and the grammar cuts it into prefixes (with
grammar.prefixes, the default), a stem and suffixes (`grammars.morph_grammar`): the
segmentation cuts at the edges of the Prefix, Stem and Suffix subtrees, metrics.jsonl has
cached_Prefix, cached_Stem, cached_Suffix and each one's discount_ and concentration_ in place
of Word's, and lexicon.tsv starts each line with the symbol (Prefix, Stem or Suffix). With
grammar.submorphs (the default) a prefix, stem or suffix may be built of cached SubMorph
pieces, whose cache is reported beside them (cached_SubMorph, lexicon lines starting SubMorph);
their edges are not cuts. With data.format conllu the inputs are the distinct written words of
a CoNLL-U file (`morphs.read_written_words`), one line each in segmentation.txt in order of
first occurrence; a word's gold is the tokens of its first occurrence, and the final note
scores every occurrence of the split written words (the goal of issue 23) beside the two
baselines.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

from treewright.adaptor.config import SegmentConfig, load_segment_config
from treewright.adaptor.grammars import morph_grammar, unigram_word_grammar
from treewright.adaptor.morphs import (SUBMORPH, WrittenWords, baseline_scores, by_type,
                                       morph_segmentations, morph_units, read_written_words)
from treewright.adaptor.posterior import BoundaryTally, recorded_sweeps
from treewright.adaptor.sampler import AdaptorSampler, annealing
from treewright.adaptor.segment import Utterances, characters, read_utterances
from treewright.config import dump_config_yaml
from treewright.corpus import normalization_note, normalization_variants
from treewright.errors import InputError
from treewright.evaluation.segmentation import SegmentationScores, evaluate_segmentation
from treewright.runfolder import RunFolder
from treewright.safeio import atomic_write_text
from treewright.tracking import Progress

RUN_CHECKPOINT_KIND = "treewright segmentation run"
RUN_CHECKPOINT_VERSION = 2  # 2: with the boundary counts; 1 read while it needs none
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
    corpus, written = _read(cfg, folder, stream)
    chars = [c for u in corpus.characters for c in u]
    if not chars:
        raise InputError("no utterances (the file is empty or blank)", path=str(cfg.data.text))
    g = cfg.grammar
    grammar = morph_grammar(chars, g.discount, g.concentration, g.more_suffixes,
                            g.more_characters, g.submorphs, g.prefixes,
                            g.more_prefixes) if g.unit == "morphs" else \
        unigram_word_grammar(chars, g.discount, g.concentration, g.more_words,
                             g.more_characters)
    folder.note(f"initializing {cfg.sampler.chains} chain(s)", stream)
    sampler = AdaptorSampler(grammar, corpus.characters, chains=cfg.sampler.chains,
                             seed=cfg.sampler.seed, source=str(cfg.data.text),
                             start=cfg.sampler.start)
    return _run(cfg, folder, corpus, written, sampler, BoundaryTally.of(sampler), stream,
                fresh=True)


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
            or state.get("version") not in (1, RUN_CHECKPOINT_VERSION):
        raise InputError(f"not a checkpoint of a segmentation run, version "
                         f"{RUN_CHECKPOINT_VERSION}", path=where)
    sampler = AdaptorSampler.from_state(state.get("chains"), source=where)
    corpus, written = _read(cfg, folder, stream)
    if corpus.characters != sampler.words:
        raise InputError("the utterances differ from those the checkpoint was sampled on",
                         path=str(cfg.data.text))
    if state["version"] == 1:  # written before runs kept boundary counts
        tally = BoundaryTally.of(sampler)
        if any(s <= sampler.chains[0].sweeps for s in _recorded(cfg)):
            raise InputError("this checkpoint is from a version that kept no boundary counts, "
                             "and sweeps it has run should have been recorded; start the run "
                             "again", path=where)
    else:
        tally = BoundaryTally.from_state(state.get("boundaries"),
                                         [len(w) for w in sampler.words], where)
    # Metric lines written after the checkpoint belong to sweeps that will run again.
    folder.truncate_metrics(int(state.get("metrics_bytes", 0)))
    folder.note(f"resuming after sweep {sampler.chains[0].sweeps} of {cfg.sampler.sweeps}",
                stream)
    return _run(cfg, folder, corpus, written, sampler, tally, stream, fresh=False)


def _read(cfg: SegmentConfig, folder: RunFolder, stream: TextIO | None
          ) -> tuple[Utterances, WrittenWords | None]:
    """The inputs, and with data.format conllu the written words they are the types of; a
    note when one character is written in two Unicode normalization forms."""
    corpus, written = _read_inputs(cfg, folder, stream)
    note = normalization_note(normalization_variants(c for u in corpus.characters for c in u),
                              "character")
    if note is not None:
        folder.note(note, stream)
    return corpus, written


def _read_inputs(cfg: SegmentConfig, folder: RunFolder, stream: TextIO | None
                 ) -> tuple[Utterances, WrittenWords | None]:
    if cfg.data.format == "conllu":
        written = read_written_words(cfg.data.text, cfg.data.case_rules)
        first = written.first_morphs()
        corpus = Utterances([characters(t) for t in first], list(first.values()), [], 0)
        folder.note(f"read {len(written.morphs)} written words ({len(written.split)} split "
                    f"into tokens), {len(first)} distinct, from {written.sentences} sentences "
                    f"of {cfg.data.text} ({written.skipped} sentences skipped: nothing but "
                    f"punctuation)", stream)
        if written.contracted:
            form, tokens = written.contracted[0]
            folder.note(f"set aside {len(written.contracted)} written words "
                        f"({len({f for f, _ in written.contracted})} distinct) that are "
                        f"contractions: their tokens do not spell them (e.g. {form!r} as "
                        f"{' + '.join(tokens)}), so they have no morph boundaries in the text "
                        f"and are neither segmented nor scored", stream)
        return corpus, written
    corpus = read_utterances(cfg.data.text)
    folder.note(f"read {len(corpus.characters)} utterances from {cfg.data.text} "
                f"({corpus.blank} blank lines skipped)", stream)
    return corpus, None


def _symbols(cfg: SegmentConfig, sampler: AdaptorSampler) -> tuple[str, ...]:
    """The adapted symbols whose top-most subtrees are the units the run cuts into (read from
    the sampler's grammar, so that a run resumed from a checkpoint cuts what it samples)."""
    return morph_units(sampler.rules.names) if cfg.grammar.unit == "morphs" else (WORD,)


def _adapted(cfg: SegmentConfig, sampler: AdaptorSampler) -> tuple[str, ...]:
    """The adapted symbols whose caches the metrics and lexicon report: the units', then
    SubMorph when the sampler's grammar has it (read from the sampler, so that a run resumed
    from a checkpoint of a grammar without it reports what it samples)."""
    has = sampler.rules.names
    return _symbols(cfg, sampler) + tuple(a for a in (SUBMORPH,)
                                          if cfg.grammar.unit == "morphs" and a in has)


def _recorded(cfg: SegmentConfig) -> list[int]:
    """The sweeps after which every chain's analyses are recorded for the segmentation."""
    return recorded_sweeps(cfg.sampler.sweeps, cfg.sampler.samples, cfg.sampler.sample_every)


def _run(cfg: SegmentConfig, folder: RunFolder, corpus: Utterances,
         written: WrittenWords | None, sampler: AdaptorSampler, tally: BoundaryTally,
         stream: TextIO | None, fresh: bool) -> SegmentResult:
    total = cfg.sampler.sweeps
    recorded = set(_recorded(cfg))
    done = sampler.chains[0].sweeps
    temperature = annealing(cfg.sampler.anneal_from, cfg.sampler.anneal_sweeps)
    loggers = folder.open_loggers(cfg.output.stdout_metrics, cfg.output.tensorboard,
                                  stream=stream)
    try:
        if fresh:
            loggers.log(_metrics(cfg, corpus, sampler, None), step=0)
        with Progress(total - done, "sweeps", unit="sweeps") as progress:
            while done < total:
                before = [(chain.proposed, chain.accepted) for chain in sampler.chains]
                sampler.run(1, temperature=temperature,
                            hyperparameters=cfg.sampler.resample_hyperparameters)
                done += 1
                if done in recorded:
                    tally.record(sampler, _symbols(cfg, sampler))
                if done % cfg.sampler.score_every == 0 or done == total:
                    metrics = _metrics(cfg, corpus, sampler, before)
                    metrics["temperature"] = temperature(done - 1)
                    loggers.log(metrics, step=done)
                if done % cfg.sampler.checkpoint_every == 0 or done == total:
                    _checkpoint(folder, sampler, tally)
                progress.update(1)
    finally:
        loggers.close()
    symbols = _symbols(cfg, sampler)
    best, joints = best_chain(sampler)
    if len(joints) > 1:
        folder.note(f"reporting chain {best} of {len(joints)}, the highest log joint "
                    f"probability ({', '.join(f'{j:.1f}' for j in joints)})", stream)
    own = morph_segmentations(sampler, best, symbols)  # the reported chain's last state
    words = own
    if tally.samples:
        rule = cfg.sampler.cut_rule
        words = tally.segmentations(corpus.characters, rule)
        least = tally.threshold(rule)
        folder.note(f"segmentation: the positions cut by at least {least} of {tally.samples} "
                    f"recorded analyses ({tally.samples // len(sampler.chains)} sweeps of "
                    f"{len(sampler.chains)} chain(s); cut rule {rule}; expected boundary F1 "
                    f"{tally.expected_f1(least):.3f} under them)", stream)
    atomic_write_text(folder.segmentation, "".join(" ".join(w) + "\n" for w in words))
    if symbols == (WORD,):
        lexicon = "".join(f"{text}\t{customers}\t{tables}\n" for
                          text, customers, tables in sampler.lexicon(WORD, best))
    else:
        lexicon = "".join(f"{a}\t{text}\t{customers}\t{tables}\n"
                          for a in _adapted(cfg, sampler)
                          for text, customers, tables in sampler.lexicon(a, best))
    atomic_write_text(folder.lexicon, lexicon)
    scores = evaluate_segmentation(words, corpus.gold, str(cfg.data.text)) \
        if cfg.data.gold else None
    if scores is not None:
        folder.note(f"after {done} sweeps: token F1 {scores.tokens.f1:.3f}, boundary F1 "
                    f"{scores.boundaries.f1:.3f}", stream)
        if tally.samples:
            alone = evaluate_segmentation(own, corpus.gold, str(cfg.data.text))
            folder.note(f"(chain {best}'s last state alone: token F1 {alone.tokens.f1:.3f}, "
                        f"boundary F1 {alone.boundaries.f1:.3f})", stream)
    if written is not None:
        types = ["".join(u) for u in corpus.characters]
        _note_split_words(folder, written, dict(zip(types, words)), stream)
        if tally.samples:
            _note_split_words(folder, written, dict(zip(types, own)), stream,
                              f"chain {best}'s last state alone")
    folder.note(f"wrote {folder.segmentation} and {folder.lexicon}", stream)
    return SegmentResult(folder.segmentation, folder.lexicon, done, scores)


def _note_split_words(folder: RunFolder, written: WrittenWords,
                      segmented: dict[str, list[str]], stream: TextIO | None,
                      label: str | None = None) -> None:
    """Boundary scores on every occurrence of the split written words, beside the baselines
    (or, with `label`, without them, for another segmentation of the same words)."""
    gold = written.split
    if not gold:
        return
    ours = evaluate_segmentation(by_type(segmented, gold), gold).boundaries
    if label is not None:
        folder.note(f"({label}: boundary precision {ours.precision:.3f}, recall "
                    f"{ours.recall:.3f}, F1 {ours.f1:.3f})", stream)
        return
    base = {k: v.boundaries for k, v in baseline_scores(gold).items()}
    folder.note(f"on the {len(gold)} split written words: boundary precision "
                f"{ours.precision:.3f}, recall {ours.recall:.3f}, F1 {ours.f1:.3f}; no split F1 "
                f"{base['no split'].f1:.3f}; every character: precision "
                f"{base['every character'].precision:.3f}, F1 {base['every character'].f1:.3f}",
                stream)


def best_chain(sampler: AdaptorSampler) -> tuple[int, list[float]]:
    """The chain with the highest log joint probability (the first on ties) and every
    chain's log joint."""
    joints = [chain.log_joint() for chain in sampler.chains]
    return joints.index(max(joints)), joints


def _metrics(cfg: SegmentConfig, corpus: Utterances, sampler: AdaptorSampler,
             before: list[tuple[int, int]] | None) -> dict[str, float]:
    """The reported chain's numbers now (`best_chain`); `before` (proposed, accepted) of each
    chain as the sweep started."""
    best, joints = best_chain(sampler)
    chain = sampler.chains[best]
    out: dict[str, float] = {"log_joint": joints[best]}
    if len(joints) > 1:
        out["chain"] = best
        out.update((f"log_joint_chain{c}", j) for c, j in enumerate(joints))
    symbols = _symbols(cfg, sampler)
    for name in _adapted(cfg, sampler):
        a = sampler.rules.names.index(name)
        suffix = "" if symbols == (WORD,) else f"_{name}"
        out["cached_words" if not suffix else f"cached{suffix}"] = len(chain.cache.labels[a])
        out[f"discount{suffix}"] = float(chain.rules.discount[a])
        out[f"concentration{suffix}"] = float(chain.rules.concentration[a])
    if before is not None:
        proposed = chain.proposed - before[best][0]
        out["accept_rate"] = (chain.accepted - before[best][1]) / proposed if proposed else 0.0
    if cfg.data.gold:
        scores = evaluate_segmentation(morph_segmentations(sampler, best, symbols),
                                       corpus.gold, str(cfg.data.text))
        out["token_f1"] = scores.tokens.f1
        out["boundary_f1"] = scores.boundaries.f1
    return out


def _checkpoint(folder: RunFolder, sampler: AdaptorSampler, tally: BoundaryTally) -> None:
    atomic_write_text(folder.checkpoint, json.dumps({
        "kind": RUN_CHECKPOINT_KIND, "version": RUN_CHECKPOINT_VERSION,
        "metrics_bytes": folder.metrics_size(), "chains": sampler.state(),
        "boundaries": tally.state()}) + "\n")
