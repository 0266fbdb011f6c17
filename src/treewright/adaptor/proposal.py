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
the labels change after every sentence. The chart holds plain float64 probabilities, filled a
width at a time: a character costs the unigram word grammar a factor of about
0.01, so utterances of up to about 150 characters stay above the smallest float64 (1e-308); a
sentence whose total underflows is refused rather than guessed at.

At a temperature T above 1 (annealing, `sampler`) the Metropolis-Hastings target is the joint
over trees and seatings to the power 1/T, and every weight of the proposal grammar is raised
to the power 1/T to stay close to it: the base rules and root, the new-table shares, and each
table's probability of being joined, summed over a label's tables after tempering (so a label
with many small tables weighs more than its summed probability to the power 1/T). An
untempered proposal had 10-48% of its trees accepted on the Ostreli corpus while T was above
1.3, this one nearly all (docs/adaptor_notes.md). Johnson & Goldwater 2009
("Improving nonparameteric Bayesian inference: experiments on unsupervised word segmentation
with adaptor grammars") anneal the PCFG approximation this way, as we remember it (from
memory, not checked).
"""

from __future__ import annotations

import math

import numpy as np

from treewright.adaptor.model import Cache, Tree, is_leaf


class ProposalChart:
    """Inside probabilities of one sentence under the proposal grammar of `cache`'s state, its
    weights raised to the power 1 / `temperature`.

    inside[i, w, A] (n+1, n+1, S): the total weight of A's proposal derivations of words
    i..i+w-1. The left children of every span of width w are one strided view,
    inside[0:m, 1:w], and their right children another, `right_of[w, 0:m, 1:w]`, a view of the
    same memory in which right_of[w, i, k] is inside[i+k, w-k] (the span after a split k words
    into the span of width w at i), so that a width costs a few numpy calls and no gather or
    copy (the engine's inside pass lays its chart out for the same reason).
    """

    def __init__(self, cache: Cache, words: list[int], temperature: float = 1.0):
        r = cache.rules
        self.cache, self.words = cache, words
        self.power = power = 1.0 / temperature
        # (NT,), (NT, S, S), (S, V): the rules as the proposal weighs them
        self.root, self.binary, lexical = r.tempered(power)
        n, s, nt = len(words), len(r.names), r.num_nt
        self.new = np.ones(s)  # (S,) the base's share of each symbol, tempered
        for a in r.adapted_ids:
            self.new[a] = cache.new_table_prob(a) ** power
        # The chart is the start of a buffer long enough for `right_of` below, a view that
        # reaches past the chart's end (into entries it never reads).
        buffer = np.zeros((2 * n + 2) * (n + 1) * s)
        inside = buffer[:(n + 1) * (n + 1) * s].reshape(n + 1, n + 1, s)
        # The rules A -> cached yield first: they do not depend on the rest of the chart. A
        # span is extended only while it is the prefix of some cached yield.
        self.sequence = sequence = tuple(words)
        for a in r.adapted_ids:
            prefixes, counts_of = cache.prefixes[a], cache.yield_counts[a]
            # `Cache.reuse_total`, written out (the same arithmetic): it runs for every cached
            # span of every sentence.
            discount, scale = r.py.discount[a], cache.customers[a] + r.py.concentration[a]
            for i in range(n):
                for j in range(i + 1, n + 1):
                    span = sequence[i:j]
                    if span not in prefixes:
                        break
                    if power == 1.0:
                        counts = counts_of.get(span)
                        weight = 0.0 if counts is None else \
                            (counts[0] - counts[1] * discount) / scale
                    else:
                        weight = math.fsum(cache.reuse_tempered(a, label, power)
                                           for label in cache.by_yield[a].get(span, ()))
                    if weight:
                        inside[i, j - i, a] = weight
        inside[0:n, 1] += self.new * lexical[:, words].T  # (n, S) one-word spans
        # (n+1, n+1, n+1, S): right_of[w, i, k] = inside[i+k, w-k], whose address is w*s1 +
        # i*s0 + k*(s0-s1) in inside's strides; only the entries with i+k <= n and k < w,
        # which lie inside the chart, are ever read. Made with np.ndarray on the buffer, which
        # checks the view's extent against it (as_strided does not, and costs several times
        # more per call).
        s0, s1, s2 = inside.strides
        right_of = np.ndarray((n + 1, n + 1, n + 1, s), dtype=inside.dtype, buffer=buffer,
                              strides=(s1, s0, s0 - s1, s2))
        right_of.flags.writeable = False
        # (S*S, NT): binary rules as a matrix from (left, right) pairs to parents, each
        # parent's column scaled by its base share.
        to_parent = self.binary.reshape(nt, s * s).T * self.new[:nt]
        for width in range(2, n + 1):
            # Every span of this width at once: m = n - width + 1 spans, k = width - 1 splits.
            m = n - width + 1
            left = inside[0:m, 1:width]                  # (m, k, S): i..i+split
            right = right_of[width, 0:m, 1:width]        # (m, k, S): i+split..i+width
            pairs = np.matmul(left.transpose(0, 2, 1), right)  # (m, S, S) summed over splits
            inside[0:m, width, :nt] += pairs.reshape(m, s * s) @ to_parent  # (m, NT)
        self.inside, self.right_of = inside, right_of
        self.top = self.root * inside[0, n, :nt]  # (NT,)
        self.total = float(self.top.sum())

    def weight(self, tree: Tree) -> float:
        """The proposal's weight of `tree`, summed over its derivations: its probability
        times `total`. At temperature 1 it is the root rule times `Cache.predictive`."""
        if self.power == 1.0:
            return self.root[tree[0]] * self.cache.predictive(tree)
        return self.root[tree[0]] * self._tempered_predictive(tree)

    def _tempered_predictive(self, tree: Tree) -> float:
        """`Cache.predictive` with every weight raised to the power 1/T: a cached label's
        reuse probability, the new-table share and each base rule."""
        cache, power = self.cache, self.power
        a = tree[0]
        p = cache.rules.rule(tree) ** power
        if not is_leaf(tree) and p > 0.0:
            p *= self._tempered_predictive(tree[1]) * self._tempered_predictive(tree[2])
        if not cache.rules.py.adapted[a]:
            return p
        return cache.reuse_tempered(a, tree, power) + self.new[a] * p

    def sample(self, rng: np.random.Generator) -> Tree:
        """A tree drawn with probability root * predictive / total (its derivations summed)."""
        if not self.total > 0.0:
            raise ValueError("the sentence has no analysis under the grammar, or its "
                             "probability underflows float64")
        return self._expand(_pick(self.top, rng), 0, len(self.words), rng)

    def _expand(self, a: int, i: int, j: int, rng: np.random.Generator) -> Tree:
        """A's subtree over words i..j-1: one of A's cached labels with this yield, or a base
        rule of A (with its split), drawn in proportion to their weights with one uniform
        number scaled by the chart's total for the span (which is their sum), so that the
        base rules' weights are computed only when no cached label is drawn."""
        r = self.cache.rules
        width = j - i
        u = rng.random() * float(self.inside[i, width, a])
        label = None
        if r.py.adapted[a]:
            for label, w in self.cache.cached(a, self.sequence[i:j]):
                u -= w if self.power == 1.0 else self.cache.reuse_tempered(a, label,
                                                                           self.power)
                if u < 0.0:
                    return label
        if width == 1:
            if label is not None and r.py.lexical[a][self.words[i]] == 0.0:
                return label  # u fell past the cached labels by rounding
            return (a, self.words[i])
        left = self.inside[i, 1:width]          # (w-1, S): the left child over i..k
        right = self.right_of[width, i, 1:width]  # (w-1, S): the right child over k..j
        # (w-1, S, S) by split, left child, right child; the base share new[a] is left out of
        # the weights and divided out of u instead.
        base = left[:, :, None] * right[:, None, :]
        base *= self.binary[a]
        base = base.ravel()
        if label is not None and not (base > 0.0).any():
            return label  # u fell past the cached labels by rounding
        pick = _pick(base, rng, u / self.new[a])
        s = len(r.names)
        split, pair = divmod(pick, s * s)
        b, c = divmod(pair, s)
        k = i + 1 + split
        return (a, self._expand(b, i, k, rng), self._expand(c, k, j, rng))


def _pick(weights: np.ndarray, rng: np.random.Generator, u: float | None = None) -> int:
    """An index drawn in proportion to non-negative `weights`: the one whose interval of the
    cumulative sum holds `u` (by default a uniform number times the sum). A u past the end,
    by rounding, or on an edge takes the last index with a positive weight before it."""
    # The array methods rather than np.cumsum and np.searchsorted, whose Python dispatch
    # costs more than the work on a short array.
    cumulative = weights.cumsum()
    if u is None:
        u = rng.random() * cumulative[-1]
    pick = min(int(cumulative.searchsorted(u, side="right")), len(weights) - 1)
    while weights[pick] <= 0.0:
        pick -= 1
    return pick
