"""Bracket scoring: unlabeled and labeled F1 of predicted trees against gold, beside baselines.

`evaluate_brackets(pred, gold)` prepares every sentence once (punctuation removal, length filter),
then scores the model and each baseline on exactly the same sentences with the same rules. Every
rule is a field of `BracketConventions` and is written into the result, so a reported number can
always be read together with how it was counted.

Scores are fractions in [0, 1] in `to_dict()` and percentages in `format_table()`.
"""

from __future__ import annotations

import random
import statistics
import unicodedata
from dataclasses import asdict, dataclass, fields
from typing import Sequence, Union

from treewright.errors import InputError
from treewright.evaluation.spans import (Bracketing, LabeledSpan, Span, binary_upper_bound,
                                         left_branching, random_binary, right_branching)
from treewright.trees import Tree

Sentence = Union[Tree, Bracketing]

# Punctuation tags: the Universal Dependencies UPOS tag and the Penn Treebank punctuation tags
# (from memory; the usual set removed before unsupervised parsing evaluation, common practice).
# Symbols such as `$`, `#` and UPOS `SYM` are words here, not punctuation.
DEFAULT_PUNCTUATION_TAGS = frozenset({"PUNCT", ",", ".", ":", "``", "''", "-LRB-", "-RRB-"})
# Used only for gold sentences without tags. Tokens made only of punctuation marks; the
# bracket-escaped forms -LRB- etc. are how treebanks write brackets (common practice).
DEFAULT_PUNCTUATION_TOKENS = frozenset({
    ".", ",", ";", ":", "!", "?", "...", "…", "\"", "'", "`", "``", "''", "(", ")", "[", "]",
    "{", "}", "-LRB-", "-RRB-", "-LSB-", "-RSB-", "-LCB-", "-RCB-", "-", "--", "–", "—",
    "«", "»", "“", "”", "‘", "’", "„", "/",
})

EMPTY_POLICIES = ("skip", "one")
MODEL = "model"
BASELINES = ("left_branching", "right_branching", "random_binary", "binary_upper_bound")
SYSTEM_TITLES = {MODEL: "model", "left_branching": "left-branching", "right_branching": "right-branching",
                 "random_binary": "random binary", "binary_upper_bound": "binary upper bound"}


@dataclass(frozen=True)
class BracketConventions:
    """How brackets are counted. Defaults follow the usual unsupervised-parsing setup.

    Fixed, not switchable: spans of one word never count, and a span that occurs more than once
    (a unary chain) counts once unlabeled (labeled: once per distinct label).
    """

    # The whole-sentence span is in every tree, so counting it only inflates scores.
    include_whole_span: bool = False
    # Punctuation is removed from both sides before scoring and every span is recomputed over the
    # remaining words. Which words are punctuation is decided on the gold sentence: by its tags
    # when it has them (a tagged "'" may be a possessive, not a quote), else by its tokens.
    remove_punctuation: bool = True
    punctuation_tags: frozenset[str] = DEFAULT_PUNCTUATION_TAGS
    punctuation_tokens: frozenset[str] = DEFAULT_PUNCTUATION_TOKENS
    # Keep only sentences of at most this many words (after punctuation removal); None keeps all.
    max_length: int | None = None
    # A sentence with no gold and no predicted span (e.g. two words, whole span excluded):
    # "skip" leaves it out of the sentence-level means, "one" counts it as P = R = F1 = 1.
    empty_sentences: str = "skip"
    # Labeled scores: None computes them when every predicted phrase label is a gold label.
    labeled: bool | None = None
    # Upper edges of the length buckets: (10, 20) gives 1-10, 11-20, 21+.
    length_buckets: tuple[int, ...] = (10, 20, 30, 40)
    # The random baseline averages this many seeded draws of every sentence's tree.
    random_draws: int = 10
    random_seed: int = 0

    def __post_init__(self) -> None:
        problems = []
        if self.empty_sentences not in EMPTY_POLICIES:
            problems.append(f"empty_sentences must be one of {EMPTY_POLICIES}, not {self.empty_sentences!r}")
        if self.max_length is not None and self.max_length < 1:
            problems.append(f"max_length must be at least 1, not {self.max_length}")
        edges = list(self.length_buckets)
        if any(e < 1 for e in edges) or edges != sorted(set(edges)):
            problems.append(f"length_buckets must be increasing positive lengths, not {self.length_buckets}")
        if self.random_draws < 1:
            problems.append(f"random_draws must be at least 1, not {self.random_draws}")
        if problems:
            raise InputError("bad evaluation conventions: " + "; ".join(problems))


@dataclass(frozen=True)
class BracketScores:
    """Precision, recall and F1 of one system over the evaluated sentences.

    Sentence-level scores are means over `sentences_scored` of the per-sentence scores; the
    per-sentence F1 is 2 * matched / (predicted + gold). Corpus-level scores pool the counts.
    A zero denominator gives 0 when the other side has spans; a score is None when it is
    undefined (no sentence scored, or no span on either side). For the random baseline every
    field is the mean over the draws, so the counts may be fractional.
    """

    sentence_f1: float | None
    sentence_precision: float | None
    sentence_recall: float | None
    corpus_f1: float | None
    corpus_precision: float | None
    corpus_recall: float | None
    matched: float
    predicted: float
    gold: float
    sentences_scored: int
    sentences_skipped_empty: int


@dataclass(frozen=True)
class LabelRecall:
    """How many gold spans of one label a system's (unlabeled) spans recover."""

    label: str
    gold: int
    found: float
    recall: float


@dataclass(frozen=True)
class LengthBucket:
    """The sentences whose length (after punctuation removal) is in [low, high]; high None = open."""

    low: int
    high: int | None
    sentences: int
    scores: dict[str, BracketScores]

    @property
    def name(self) -> str:
        return f"{self.low}+" if self.high is None else f"{self.low}-{self.high}"


@dataclass
class BracketEvaluation:
    """The result of `evaluate_brackets`.

    systems: "model" (when predictions were given) and every baseline, each a `BracketScores`.
    labeled: the model's labeled scores, or None (see conventions["labeled"] for why).
    random_sd: standard deviation over the random draws of its sentence_f1 and corpus_f1.
    label_recall: per system, per gold label.
    counts: sentences read, removed (and why), evaluated; punctuation words removed.
    conventions: every counting rule, in words and values.
    """

    systems: dict[str, BracketScores]
    labeled: BracketScores | None
    random_sd: dict[str, float | None]
    label_recall: dict[str, dict[str, LabelRecall]]
    buckets: list[LengthBucket]
    counts: dict[str, int]
    conventions: dict[str, object]

    def to_dict(self) -> dict:
        """Plain lists, dicts, strings and numbers only: ready for json.dumps."""
        return {
            "systems": {name: asdict(s) for name, s in self.systems.items()},
            "labeled": None if self.labeled is None else asdict(self.labeled),
            "random_sd": dict(self.random_sd),
            "label_recall": {name: {label: asdict(r) for label, r in per.items()}
                             for name, per in self.label_recall.items()},
            "length_buckets": [{"name": b.name, "low": b.low, "high": b.high, "sentences": b.sentences,
                                "scores": {name: asdict(s) for name, s in b.scores.items()}}
                               for b in self.buckets],
            "counts": dict(self.counts),
            "conventions": dict(self.conventions),
        }

    def format_table(self) -> str:
        """A plain-text report: the systems side by side, then buckets, label recall, conventions."""
        names = list(self.systems)
        width = max(len(_title(n, self.conventions)) for n in names) + 2
        c = self.counts
        lines = [f"Unlabeled brackets on {c['evaluated']} of {c['read']} sentences (scores in %)", ""]
        head = ["sent-F1", "sent-P", "sent-R", "corp-F1", "corp-P", "corp-R"]
        lines.append("system".ljust(width) + "".join(h.rjust(9) for h in head))
        for name in names:
            s = self.systems[name]
            row = [s.sentence_f1, s.sentence_precision, s.sentence_recall,
                   s.corpus_f1, s.corpus_precision, s.corpus_recall]
            lines.append(_title(name, self.conventions).ljust(width) + "".join(_pct(v).rjust(9) for v in row))
        if self.random_sd.get("sentence_f1") is not None:
            lines.append(f"  random binary sd over draws: sent-F1 {_pct(self.random_sd['sentence_f1'])}, "
                         f"corp-F1 {_pct(self.random_sd['corpus_f1'])}")
        if self.labeled is not None:
            lab = self.labeled
            lines.append(f"  labeled (model): sent-F1 {_pct(lab.sentence_f1)}, corp-F1 {_pct(lab.corpus_f1)}, "
                         f"corp-P {_pct(lab.corpus_precision)}, corp-R {_pct(lab.corpus_recall)}")
        if self.buckets:
            lines += ["", "Sentence-level F1 by length (words after punctuation removal)"]
            cells = [f"{b.name} (n={b.sentences})" for b in self.buckets]
            cw = max(len(x) for x in cells) + 2
            lines.append("system".ljust(width) + "".join(x.rjust(cw) for x in cells))
            for name in names:
                lines.append(_title(name, self.conventions).ljust(width)
                             + "".join(_pct(b.scores[name].sentence_f1).rjust(cw) for b in self.buckets))
        labels = sorted({label for per in self.label_recall.values() for label in per},
                        key=lambda lab: -self.label_recall[names[0]][lab].gold)
        if labels:
            lines += ["", "Recall of gold spans by gold label"]
            lw = max(len(lab) for lab in labels) + 2
            short = [SYSTEM_TITLES[n] for n in names]
            cw = max(len(x) for x in short) + 2
            lines.append("label".ljust(lw) + "gold".rjust(8) + "".join(x.rjust(cw) for x in short))
            for label in labels:
                total = self.label_recall[names[0]][label].gold
                lines.append(label.ljust(lw) + str(total).rjust(8)
                             + "".join(_pct(self.label_recall[n][label].recall).rjust(cw) for n in names))
        lines += ["", "Counts"] + [f"  {k}: {v}" for k, v in self.counts.items()]
        lines += ["", "Conventions"] + [f"  {k}: {v}" for k, v in self.conventions.items()]
        return "\n".join(lines)


def _title(name: str, conventions: dict) -> str:
    if name == "random_binary":
        return f"random binary ({conventions['random_draws']} draws)"
    return SYSTEM_TITLES[name]


def _pct(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.1f}"


@dataclass(frozen=True)
class _Prepared:
    """One evaluated sentence after punctuation removal: its length and gold span sets."""

    index: int  # 1-based position in the input, for messages
    length: int
    gold: frozenset[Span]
    gold_labeled: frozenset[LabeledSpan]


def evaluate_brackets(pred: Sequence[Sentence] | None, gold: Sequence[Sentence],
                      conventions: BracketConventions | None = None, *,
                      pred_path: str | None = None, gold_path: str | None = None) -> BracketEvaluation:
    """Score predicted trees against gold trees, beside the baselines, on the same sentences.

    pred, gold: one `Tree` or `Bracketing` per sentence, in the same order and with the same
        words. `pred` may be None to report the baselines alone.
    pred_path, gold_path: where the sentences came from, only for error messages.
    Raises InputError, naming the first mismatching sentence (1-based), when the two sides differ
    in sentence count or in the words of a sentence, or when a span lies outside its sentence.
    """
    conv = conventions or BracketConventions()
    gold_b = [_as_bracketing(g) for g in gold]
    pred_b = None if pred is None else [_as_bracketing(p) for p in pred]
    _check_inputs(pred_b, gold_b, pred_path, gold_path)

    counts = {"read": len(gold_b), "empty_after_punctuation": 0, "longer_than_max_length": 0,
              "evaluated": 0, "punctuation_words_removed": 0, "words_evaluated": 0}
    prepared: list[_Prepared] = []
    pred_kept: list[Bracketing] = []
    for index, g in enumerate(gold_b):
        drop = _punctuation_positions(g, conv) if conv.remove_punctuation else []
        counts["punctuation_words_removed"] += len(drop)
        g = g.remove_words(drop)
        n = len(g.words)
        if n == 0:
            counts["empty_after_punctuation"] += 1
            continue
        if conv.max_length is not None and n > conv.max_length:
            counts["longer_than_max_length"] += 1
            continue
        counts["evaluated"] += 1
        counts["words_evaluated"] += n
        prepared.append(_Prepared(index + 1, n, _counted(g.unlabeled(), n, conv), _counted(g.spans, n, conv)))
        if pred_b is not None:
            pred_kept.append(pred_b[index].remove_words(drop))

    # Each system is a list of draws; a draw gives every prepared sentence its predicted spans.
    draws: dict[str, list[list[frozenset[Span]]]] = {}
    if pred_b is not None:
        draws[MODEL] = [[_counted(p.unlabeled(), s.length, conv) for p, s in zip(pred_kept, prepared)]]
    draws["left_branching"] = [[_counted(left_branching(s.length), s.length, conv) for s in prepared]]
    draws["right_branching"] = [[_counted(right_branching(s.length), s.length, conv) for s in prepared]]
    rng = random.Random(conv.random_seed)
    draws["random_binary"] = [[_counted(random_binary(s.length, rng), s.length, conv) for s in prepared]
                              for _ in range(conv.random_draws)]
    upper = []
    for s in prepared:
        try:
            upper.append(_counted(binary_upper_bound(s.length, s.gold), s.length, conv))
        except ValueError as err:
            raise InputError(f"sentence {s.index}: {err}, so no tree holds all gold spans",
                             path=gold_path, line=s.index) from None
    draws["binary_upper_bound"] = [upper]

    golds = [s.gold for s in prepared]
    systems = {name: _mean_scores([_score(d, golds, conv) for d in ds]) for name, ds in draws.items()}
    random_runs = [_score(d, golds, conv) for d in draws["random_binary"]]
    random_sd = {key: _sd([getattr(r, key) for r in random_runs]) for key in ("sentence_f1", "corpus_f1")}

    labeled, labeled_note = None, "not computed: no predictions"
    if pred_b is not None:
        pred_labeled = [_counted(p.spans, s.length, conv) for p, s in zip(pred_kept, prepared)]
        labeled_note = _labeled_decision(pred_labeled, prepared, conv)
        if labeled_note.startswith("computed"):
            labeled = _score(pred_labeled, [s.gold_labeled for s in prepared], conv)

    label_recall = {name: _label_recall(ds, prepared) for name, ds in draws.items()}
    buckets = _buckets(draws, prepared, conv)
    return BracketEvaluation(systems, labeled, random_sd, label_recall, buckets, counts,
                             _describe(conv, labeled_note))


def _as_bracketing(item: Sentence) -> Bracketing:
    if isinstance(item, Bracketing):
        return item
    if isinstance(item, Tree):
        return Bracketing.from_tree(item)
    raise TypeError(f"expected a Tree or a Bracketing, got {type(item).__name__}")


def _check_inputs(pred: list[Bracketing] | None, gold: list[Bracketing],
                  pred_path: str | None, gold_path: str | None) -> None:
    path = pred_path if pred_path is not None else gold_path
    against = f" (gold: {gold_path})" if gold_path is not None and pred_path is not None else ""
    if pred is not None and len(pred) != len(gold):
        first = min(len(pred), len(gold)) + 1
        raise InputError(f"sentence {first}: predictions have {len(pred)} sentences, gold has "
                         f"{len(gold)}{against}", path=path, line=first)
    for index, g in enumerate(gold):
        sides = [("gold", g, gold_path)]
        if pred is not None:
            p = pred[index]
            sides.append(("predicted", p, path))
            if p.words != g.words:
                raise InputError(f"sentence {index + 1}: {word_difference(p.words, g.words)}{against}",
                                 path=path, line=index + 1)
        for side, b, where in sides:
            n = len(b.words)
            bad = [sp for sp in b.spans if not 0 <= sp[0] < sp[1] <= n]
            if bad:
                raise InputError(f"sentence {index + 1}: {side} span {bad[0][:2]} is outside its {n} words",
                                 path=where, line=index + 1)
            if b.tags is not None and len(b.tags) != n:
                raise InputError(f"sentence {index + 1}: {side} sentence has {len(b.tags)} tags for {n} words",
                                 path=where, line=index + 1)


def word_difference(pred: Sequence[str], gold: Sequence[str]) -> str:
    """Where two sentences' words first differ, for an error message."""
    for position, (p, g) in enumerate(zip(pred, gold)):
        if p != g:
            return f"predicted word {position + 1} is {p!r}, gold has {g!r}" + \
                normalization_hint(p, g)
    return f"predicted sentence has {len(pred)} words, gold has {len(gold)}"


def normalization_hint(pred: str, gold: str) -> str:
    """For two words that differ only in their Unicode normalization (a composed letter against
    a letter and a combining mark, which look alike), what to do; else ""."""
    if unicodedata.normalize("NFC", pred) != unicodedata.normalize("NFC", gold):
        return ""

    def points(word: str) -> str:
        return " ".join(f"U+{ord(c):04X}" for c in word)
    return (f" (the same word in two Unicode normalization forms: {points(pred)} against "
            f"{points(gold)}; write both files in one form, for example NFC)")


def _punctuation_positions(gold: Bracketing, conv: BracketConventions) -> list[int]:
    if gold.tags is not None:
        return [i for i, tag in enumerate(gold.tags) if tag in conv.punctuation_tags]
    return [i for i, word in enumerate(gold.words) if word in conv.punctuation_tokens]


def _counted(spans, n: int, conv: BracketConventions) -> frozenset:
    """The spans that count: width >= 2, and the whole sentence only when asked for."""
    return frozenset(sp for sp in spans if sp[1] - sp[0] >= 2
                     and (conv.include_whole_span or (sp[0], sp[1]) != (0, n)))


def _ratio(num: float, den: float, other_side: float) -> float | None:
    if den:
        return num / den
    return 0.0 if other_side else None


def _score(pred: Sequence[frozenset], gold: Sequence[frozenset], conv: BracketConventions) -> BracketScores:
    """Sentence-level and corpus-level scores of parallel lists of span sets."""
    per_sentence: list[tuple[float, float, float]] = []
    skipped = 0
    matched = predicted = total_gold = 0
    for p, g in zip(pred, gold):
        m = len(p & g)
        matched, predicted, total_gold = matched + m, predicted + len(p), total_gold + len(g)
        if not p and not g:
            if conv.empty_sentences == "skip":
                skipped += 1
            else:
                per_sentence.append((1.0, 1.0, 1.0))
            continue
        per_sentence.append((_ratio(m, len(p), len(g)), _ratio(m, len(g), len(p)),
                             2 * m / (len(p) + len(g))))
    means = [statistics.fmean(col) for col in zip(*per_sentence)] or [None, None, None]
    return BracketScores(
        sentence_precision=means[0], sentence_recall=means[1], sentence_f1=means[2],
        corpus_precision=_ratio(matched, predicted, total_gold),
        corpus_recall=_ratio(matched, total_gold, predicted),
        corpus_f1=_ratio(2 * matched, predicted + total_gold, 0),
        matched=matched, predicted=predicted, gold=total_gold,
        sentences_scored=len(per_sentence), sentences_skipped_empty=skipped)


def _mean_scores(runs: list[BracketScores]) -> BracketScores:
    """Field-by-field mean over draws (a single draw is returned as it is)."""
    if len(runs) == 1:
        return runs[0]
    values = {}
    for f in fields(BracketScores):
        column = [getattr(r, f.name) for r in runs]
        if None in column:
            values[f.name] = None
        elif f.name in ("sentences_scored", "sentences_skipped_empty"):
            values[f.name] = column[0]  # sentence counts do not depend on the draw
        else:
            values[f.name] = statistics.fmean(column)
    return BracketScores(**values)


def _sd(values: list[float | None]) -> float | None:
    if None in values:
        return None
    return statistics.pstdev(values) if len(values) > 1 else 0.0


def _labeled_decision(pred_labeled: list[frozenset], prepared: list[_Prepared], conv: BracketConventions) -> str:
    if conv.labeled is False:
        return "not computed: switched off"
    pred_labels = {sp[2] for spans in pred_labeled for sp in spans}
    gold_labels = {sp[2] for s in prepared for sp in s.gold_labeled}
    if conv.labeled:
        return "computed: asked for"
    if None in pred_labels or not pred_labels:
        return "not computed: predictions carry no phrase labels"
    foreign = sorted(pred_labels - gold_labels)
    if foreign:
        shown = ", ".join(foreign[:5]) + (", ..." if len(foreign) > 5 else "")
        return f"not computed: predicted labels not in the gold inventory ({shown})"
    return "computed: every predicted phrase label is a gold label"


def _label_recall(draws: list[list[frozenset[Span]]], prepared: list[_Prepared]) -> dict[str, LabelRecall]:
    """Per gold label: the gold spans with that label whose interval the system predicts.

    A gold span counted twice under one interval with two labels (a unary chain) counts for each;
    unlabeled gold spans have no entry.
    """
    totals: dict[str, int] = {}
    found: dict[str, float] = {}
    for s in prepared:
        for _, _, label in s.gold_labeled:
            if label is not None:
                totals[label] = totals.get(label, 0) + 1
    for draw in draws:
        for pred, s in zip(draw, prepared):
            for start, end, label in s.gold_labeled:
                if label is not None and (start, end) in pred:
                    found[label] = found.get(label, 0) + 1 / len(draws)
    return {label: LabelRecall(label, total, found.get(label, 0), found.get(label, 0) / total)
            for label, total in totals.items()}


def _buckets(draws: dict[str, list[list[frozenset[Span]]]], prepared: list[_Prepared],
             conv: BracketConventions) -> list[LengthBucket]:
    edges = list(conv.length_buckets)
    bounds = [(low, high) for low, high in zip([1] + [e + 1 for e in edges], edges + [None])]
    out = []
    for low, high in bounds:
        members = [i for i, s in enumerate(prepared) if s.length >= low and (high is None or s.length <= high)]
        golds = [prepared[i].gold for i in members]
        scores = {name: _mean_scores([_score([d[i] for i in members], golds, conv) for d in ds])
                  for name, ds in draws.items()}
        out.append(LengthBucket(low, high, len(members), scores))
    return out


def _describe(conv: BracketConventions, labeled_note: str) -> dict[str, object]:
    return {
        "one_word_spans": "never counted",
        "whole_sentence_span": "counted" if conv.include_whole_span else "not counted",
        "duplicate_spans": "counted once (unlabeled); labeled, once per distinct label",
        "punctuation": ("removed before scoring, spans recomputed over the remaining words; decided on "
                        "the gold sentence, by its tags when it has them, else by its tokens"
                        if conv.remove_punctuation else "kept"),
        "punctuation_tags": sorted(conv.punctuation_tags),
        "punctuation_tokens": sorted(conv.punctuation_tokens),
        "max_length": conv.max_length,
        "length": "words after punctuation removal",
        "sentence_level": "mean over sentences of per-sentence P, R and F1 = 2*matched/(predicted+gold)",
        "corpus_level": "pooled matched, predicted and gold counts over all evaluated sentences",
        "empty_sentences": ("sentences with no gold and no predicted span are left out of sentence-level means"
                            if conv.empty_sentences == "skip"
                            else "sentences with no gold and no predicted span count as P = R = F1 = 1"),
        "zero_denominator": "a score with zero denominator is 0 when the other side has spans, else undefined",
        "labeled": labeled_note,
        "label_recall": "gold spans per gold label whose interval the system predicts (unlabeled match)",
        "random_draws": conv.random_draws,
        "random_seed": conv.random_seed,
        "random_binary": "uniform over all binary bracketings of each sentence; scores are means over draws",
        "binary_upper_bound": "a binary tree containing every gold span (gold nodes binarized right-branching)",
        "length_buckets": list(conv.length_buckets),
    }
