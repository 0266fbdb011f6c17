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
S): on utterances of up to a few hundred characters a tree's probability stays far above the
smallest float64, and a sentence whose total underflows is refused rather than guessed at.
"""

from __future__ import annotations

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
        chart = np.zeros((n, n + 1, s))
        for width in range(1, n + 1):
            for i in range(n - width + 1):
                j = i + width
                if width == 1:
                    cell = self.new * r.lexical[:, words[i]]  # (S,)
                else:
                    pairs = chart[i, i + 1:j].T @ chart[i + 1:j, j]  # (S, S) summed over splits
                    cell = np.zeros(s)
                    cell[:nt] = self.new[:nt] * (self.binary_flat @ pairs.ravel())
                span = tuple(words[i:j])
                for a in self.adapted:
                    for _, weight in cache.cached(a, span):
                        cell[a] += weight
                chart[i, j] = cell
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
