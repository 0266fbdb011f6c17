"""The proposal of the Metropolis-Hastings step: the PCFG approximation of the adaptor grammar
in its current state (Johnson, Griffiths & Goldwater 2007, section 4).

Each adapted symbol A gets, besides its base rules scaled by the probability of a new table,
one rule A -> y per cached label y, weighted by the probability of reusing y; a tree is drawn
from the inside chart of these rules, top-down. A tree's probability under this grammar,
summed over its derivations (a cached label can also be rebuilt from the base rules), is the
root rule times `Cache.predictive`.

This is a small chart of its own, not `treewright.engine`: the rules A -> y rewrite one symbol
to a whole cached yield of any length, which the engine's binarized layout (binary and
one-word rules, one grammar per batch) cannot hold without a new symbol per cached label, and
the labels change after every sentence. The chart holds plain float64 probabilities, (n, n+1,
S), filled a width at a time: a character costs the unigram word grammar a factor of about
0.01, so utterances of up to about 150 characters stay above the smallest float64 (1e-308); a
sentence whose total underflows is refused rather than guessed at.
"""

from __future__ import annotations

import math

import numpy as np

from treewright.adaptor.model import Cache, Tree


class ProposalChart:
    """Inside probabilities of one sentence under the proposal grammar of `cache`'s state.

    chart[i, j, A] (n, n+1, S): the total weight of A's proposal derivations of words i..j-1.
    """

    def __init__(self, cache: Cache, words: list[int]):
        r = cache.rules
        self.cache, self.words = cache, words
        n, s, nt = len(words), len(r.names), r.num_nt
        self.new = np.array([cache.new_table_prob(a) if r.adapted[a] else 1.0
                             for a in range(s)])  # (S,) the base's share of each symbol
        self.adapted = [a for a in range(s) if r.adapted[a]]
        self.binary_flat = r.binary.reshape(nt, s * s)  # (NT, S*S)
        # The rules A -> cached yield first, (n, n+1, S): they do not depend on the chart.
        chart = np.zeros((n, n + 1, s))
        for a in self.adapted:
            cached = cache.by_yield[a]
            if not cached:
                continue
            longest = max(map(len, cached))
            for i in range(n):
                for j in range(i + 1, min(n, i + longest) + 1):
                    span = tuple(words[i:j])
                    if span in cached:
                        chart[i, j, a] = math.fsum(w for _, w in cache.cached(a, span))
        starts = np.arange(n)
        chart[starts, starts + 1] += self.new * r.lexical[:, words].T  # (n, S) one-word spans
        for width in range(2, n + 1):
            # Every span of this width at once: m = n - width + 1 spans, k = width - 1 splits.
            i = starts[:n - width + 1, None]                        # (m, 1)
            k = np.arange(1, width)[None, :]                        # (1, k)
            left = chart[i, i + k]                                  # (m, k, S) over i..i+k
            right = chart[i + k, i + width]                         # (m, k, S) over i+k..j
            pairs = np.einsum("mks,mkt->mst", left, right)          # (m, S, S)
            base = pairs.reshape(len(pairs), s * s) @ self.binary_flat.T  # (m, NT)
            chart[i[:, 0], i[:, 0] + width, :nt] += self.new[:nt] * base
        self.chart = chart
        self.top = r.root * chart[0, n, :nt]  # (NT,)
        self.total = float(self.top.sum())

    def sample(self, rng: np.random.Generator) -> Tree:
        """A tree drawn with probability root * predictive / total (its derivations summed)."""
        if not self.total > 0.0:
            raise ValueError("the sentence has no analysis under the grammar, or its "
                             "probability underflows float64")
        return self._expand(_pick(self.top, rng), 0, len(self.words), rng)

    def _expand(self, a: int, i: int, j: int, rng: np.random.Generator) -> Tree:
        r = self.cache.rules
        cached = self.cache.cached(a, tuple(self.words[i:j])) if r.adapted[a] else []
        if j - i == 1:
            base = np.array([self.new[a] * r.lexical[a, self.words[i]]])
        elif a < r.num_nt:
            left = self.chart[i, i + 1:j]   # (w-1, S): the left child over i..k
            right = self.chart[i + 1:j, j]  # (w-1, S): the right child over k..j
            base = (self.new[a] * r.binary[a][None] * left[:, :, None]
                    * right[:, None, :]).ravel()  # (w-1, S, S) by split, left, right
        else:
            base = np.zeros(0)
        weights = np.concatenate([np.array([w for _, w in cached]), base])
        pick = _pick(weights, rng)
        if pick < len(cached):
            return cached[pick][0]
        pick -= len(cached)
        if j - i == 1:
            return (a, self.words[i])
        s = len(r.names)
        split, rest = divmod(pick, s * s)
        b, c = divmod(rest, s)
        k = i + 1 + split
        return (a, self._expand(b, i, k, rng), self._expand(c, k, j, rng))


def _pick(weights: np.ndarray, rng: np.random.Generator) -> int:
    """An index drawn in proportion to non-negative `weights` (one uniform number)."""
    cumulative = np.cumsum(weights)
    u = rng.random() * cumulative[-1]
    pick = int(np.searchsorted(cumulative, u, side="right"))
    while pick >= len(weights) or weights[pick] <= 0.0:  # u landed on the last edge
        pick -= 1
    return pick
