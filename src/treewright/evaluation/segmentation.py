"""A segmentation of unsegmented text against the gold one: boundary and token scores.

A segmentation of an utterance is its list of words; joined, predicted and gold must give the
same characters. Conventions (common practice in word segmentation since Goldwater, Griffiths
& Johnson 2009, "A Bayesian framework for word segmentation: exploring the effects of
context"):
- boundaries are the positions between two characters where a word ends; the utterance's own
  edges are not counted (they are given, not found);
- a predicted token is correct when a gold token has the same start and end;
- precision, recall and F1 are pooled over the whole corpus (micro averages), and a ratio with
  nothing to count (no predicted boundary, say) is 0.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

from treewright.errors import InputError


@dataclass(frozen=True)
class PRF:
    """Precision, recall and F1 of `correct` items among `predicted` and `gold`."""

    precision: float
    recall: float
    f1: float
    correct: int
    predicted: int
    gold: int

    @classmethod
    def of(cls, correct: int, predicted: int, gold: int) -> "PRF":
        p = correct / predicted if predicted else 0.0
        r = correct / gold if gold else 0.0
        return cls(p, r, 2 * p * r / (p + r) if p + r else 0.0, correct, predicted, gold)


@dataclass(frozen=True)
class SegmentationScores:
    boundaries: PRF
    tokens: PRF
    utterances: int


def spans(words: Sequence[str]) -> list[tuple[int, int]]:
    """(start, end) character offsets of each word."""
    out, at = [], 0
    for w in words:
        out.append((at, at + len(w)))
        at += len(w)
    return out


def boundaries(words: Sequence[str]) -> set[int]:
    """The inner boundaries of a segmentation: the end offset of every word but the last."""
    return {end for _, end in spans(words)[:-1]}


def evaluate_segmentation(predicted: Sequence[Sequence[str]], gold: Sequence[Sequence[str]],
                          source: str = "<gold>") -> SegmentationScores:
    """Boundary and token precision, recall and F1 of `predicted` against `gold` (one list of
    words per utterance, in the same order). Raises InputError, naming the utterance (its
    line, counting from one), when the two do not join to the same characters."""
    if len(predicted) != len(gold):
        raise InputError(f"{len(predicted)} segmented utterances against {len(gold)} gold ones",
                         path=source)
    b = [0, 0, 0]  # correct, predicted, gold
    t = [0, 0, 0]
    for k, (pred, ref) in enumerate(zip(predicted, gold)):
        if "".join(pred) != "".join(ref):
            raise InputError(f"the segmentation joins to {''.join(pred)!r}, the gold one to "
                             f"{''.join(ref)!r}", path=source, line=k + 1)
        if any(not w for w in pred) or any(not w for w in ref):
            raise InputError("a segmentation has an empty word", path=source, line=k + 1)
        pb, gb = boundaries(pred), boundaries(ref)
        b[0] += len(pb & gb)
        b[1] += len(pb)
        b[2] += len(gb)
        ps, gs = set(spans(pred)), set(spans(ref))
        t[0] += len(ps & gs)
        t[1] += len(ps)
        t[2] += len(gs)
    return SegmentationScores(PRF.of(*b), PRF.of(*t), len(gold))
