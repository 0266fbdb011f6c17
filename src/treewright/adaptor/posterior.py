"""Segmentation from the boundary posterior: the analyses of every chain at several late
sweeps, each position cut when enough of them cut it.

A chain's state is one draw from the posterior, and chains started apart settle in different
modes that make different mistakes. The share of recorded analyses (every chain's, at each
recorded sweep) that cut a position between two characters estimates the posterior
probability that it is a boundary. Cutting exactly the positions whose share is above one half
gives the segmentation with the fewest expected wrongly decided positions: minimum Bayes risk
under that count, decided position by position from marginals, as Goodman (1996, "Parsing
Algorithms and Metrics") decides brackets from their posteriors. A position cut by exactly
half is left uncut. What it gained over the most probable chain is in
`docs/adaptor_notes.md`.

Segmentations are judged by boundary and token F1, not by the count of wrong positions, and
boundaries are rare, so the majority rule gives up recall for precision. The rule
"expected-f1" cuts instead the positions that maximize the expected boundary F1 under the same
posterior, in the approximation of Jansche (2005, "Maximum Expected F-Measure Training of
Logistic Regression Models"), which takes the expectation of the numerator and of the
denominator apart: with p the shares, cutting the set C scores 2 sum_C p / (|C| + sum_all p).
For |C| fixed the best C holds the largest shares, and within a run of equal shares the score
moves one way, so the best C is every position whose count reaches some threshold: the rule
tries each of the `samples` thresholds and keeps the best (the highest one on a tie). Its
threshold comes out near half the F1 it expects, as Lipton, Elkan & Naryanaswamy (2014,
"Optimal Thresholding of Classifiers to Maximize F1 Measure") show of calibrated
probabilities. It reads the model's posterior alone, never the gold.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from treewright.adaptor.sampler import AdaptorSampler
from treewright.adaptor.segment import boundaries, cut
from treewright.errors import InputError

CUT_RULES = ("majority", "expected-f1")


class BoundaryTally:
    """How often each position of each utterance was cut, over `samples` recorded analyses.

    counts[u][k - 1] is the count of position k of utterance u (between characters k - 1 and
    k), for k from 1 to its length - 1.
    """

    def __init__(self, lengths: Sequence[int]):
        self.counts = [np.zeros(max(n - 1, 0), dtype=np.int64) for n in lengths]
        self.samples = 0

    @classmethod
    def of(cls, sampler: AdaptorSampler) -> "BoundaryTally":
        """An empty tally over the utterances of `sampler`."""
        return cls([len(w) for w in sampler.words])

    def record(self, sampler: AdaptorSampler, symbols: Sequence[str]) -> None:
        """Add the current analysis of every chain of `sampler` (one sample each), cut at the
        edges of the top-most subtrees of `symbols` (Word; Prefix, Stem and Suffix for morphs)."""
        if [max(len(w) - 1, 0) for w in sampler.words] != [len(c) for c in self.counts]:
            raise ValueError("the sampler's utterances are not those of this tally")
        ids = []
        for name in symbols:
            if name not in sampler.rules.names:
                raise ValueError(f"the grammar has no symbol {name}")
            ids.append(sampler.rules.names.index(name))
        for c in range(len(sampler.chains)):
            for counts, tree, chars in zip(self.counts, sampler.trees(c), sampler.words):
                positions = boundaries(tree, ids, len(chars))
                counts[np.array(positions, dtype=np.int64) - 1] += 1
            self.samples += 1

    def shares(self) -> list[np.ndarray]:
        """Per utterance, each position's share of the recorded analyses that cut it (the
        estimated posterior probability of a boundary there)."""
        if not self.samples:
            raise ValueError("no analyses were recorded")
        return [c / self.samples for c in self.counts]

    def threshold(self, rule: str = "majority") -> int:
        """The least count of recorded analyses that cuts a position under `rule`:
        "majority" (more than half of them) or "expected-f1" (the module's docstring)."""
        if not self.samples:
            raise ValueError("no analyses were recorded")
        if rule == "majority":
            return self.samples // 2 + 1
        if rule != "expected-f1":
            raise ValueError(f"unknown cut rule {rule!r}; expected one of {CUT_RULES}")
        return max(range(1, self.samples + 1), key=lambda t: (self.expected_f1(t), t))

    def expected_f1(self, threshold: int) -> float:
        """The boundary F1 that cutting the positions of count >= `threshold` expects under the
        recorded analyses, as the ratio of the expected overlap to the expected sizes
        (Jansche 2005); 0 when no analysis and no decision cuts anything."""
        if not self.samples:
            raise ValueError("no analyses were recorded")
        every = np.concatenate([np.zeros(0, dtype=np.int64), *self.counts])
        kept = every[every >= threshold]
        total = every.sum() / self.samples
        size = len(kept) + total
        return float(2 * kept.sum() / self.samples / size) if size else 0.0

    def positions(self, rule: str = "majority") -> list[list[int]]:
        """Per utterance, the positions cut under `rule` (`threshold`)."""
        least = self.threshold(rule)
        return [(np.flatnonzero(c >= least) + 1).tolist() for c in self.counts]

    def segmentations(self, words: Sequence[Sequence[str]],
                      rule: str = "majority") -> list[list[str]]:
        """Each utterance's characters (`words`, as the sampler has them) cut at `positions`."""
        return [cut(chars, p) for chars, p in zip(words, self.positions(rule))]

    # ---- the checkpoint ----------------------------------------------------------------------

    def state(self) -> dict:
        return {"samples": self.samples, "counts": [c.tolist() for c in self.counts]}

    @classmethod
    def from_state(cls, state: object, lengths: Sequence[int], source: str) -> "BoundaryTally":
        """The tally saved by `state`, over utterances of `lengths` characters; a damaged or
        mismatched state raises InputError naming `source`."""
        tally = cls(lengths)

        def bad(why: str) -> InputError:
            return InputError(f"boundary counts: {why}", path=source)

        if not isinstance(state, dict) or set(state) != {"samples", "counts"}:
            raise bad("expected an object with samples and counts")
        samples, counts = state["samples"], state["counts"]
        if not isinstance(samples, int) or isinstance(samples, bool) or samples < 0:
            raise bad(f"samples must be a count, not {samples!r}")
        if not isinstance(counts, list) or len(counts) != len(tally.counts):
            raise bad(f"expected counts for {len(tally.counts)} utterances")
        for u, (row, empty) in enumerate(zip(counts, tally.counts)):
            if not isinstance(row, list) or len(row) != len(empty) or not all(
                    isinstance(x, int) and not isinstance(x, bool) and 0 <= x <= samples
                    for x in row):
                raise bad(f"utterance {u + 1}: expected {len(empty)} counts from 0 to "
                          f"{samples}")
            empty[:] = row
        tally.samples = samples
        return tally


def recorded_sweeps(sweeps: int, samples: int, every: int) -> list[int]:
    """The sweeps (counted from 1) after which a run of `sweeps` records its analyses: the
    last one and every `every`-th before it, `samples` in all, none before the first."""
    return sorted(s for s in range(sweeps, sweeps - samples * every, -every) if s >= 1)
