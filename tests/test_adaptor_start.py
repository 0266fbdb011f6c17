"""The adaptor-grammar sampler's first state, and its proposal at a temperature above 1."""

from __future__ import annotations

import itertools
import math
from collections import Counter

import pytest
from scipy.stats import chisquare

from test_adaptor import NESTED, WORDS, _binned, enumerate_trees
from treewright.adaptor import AdaptorSampler
from treewright.adaptor.proposal import ProposalChart
from treewright.grammar import parse_grammar


def base_posterior(grammar, words):
    """P(tree | words) under the plain PCFG (no caching): each tree of `words` enumerated by
    brute force (`enumerate_trees`), weighted by its root and rule probabilities."""
    lexical, binary, root = grammar.lexical.exp(), grammar.binary.exp(), grammar.root.exp()

    def prob(node):
        if len(node) == 2:
            return float(lexical[node[0], node[1]])
        return float(binary[node[0], node[1][0], node[2][0]]) * prob(node[1]) * prob(node[2])

    weights = {t: float(root[t[0]]) * prob(t) for t in enumerate_trees(grammar, words)}
    total = math.fsum(weights.values())
    return {t: w / total for t, w in weights.items()}


def test_a_batch_start_draws_every_tree_from_the_base_grammar_alone():
    # Johnson & Goldwater 2009's batch initialisation: each sentence's first tree is an
    # independent draw from the base PCFG, so the pair of first trees of two equal sentences
    # follows the product of the brute-force PCFG posteriors. The incremental start draws the
    # second given the first's cached labels, and must be rejected at the same level.
    g = parse_grammar(NESTED)
    one = base_posterior(g, "aab")
    expected = {(x, y): one[x] * one[y] for x, y in itertools.product(one, one)}
    for start, fits in (("batch", True), ("incremental", False)):
        counts: Counter = Counter()
        for seed in range(3000):
            chain = AdaptorSampler(g, ["aab", "aab"], seed=seed, start=start).chains[0]
            counts[tuple(a.tree for a in chain.analyses)] += 1
        observed, wanted = _binned(counts, expected, sum(counts.values()))
        # Pearson's chi-square (scipy.stats.chisquare); independent draws, so the usual
        # level of 0.01 would do, but 0.001 keeps the test as strict as its neighbours.
        assert (chisquare(observed, wanted).pvalue > 1e-3) == fits


def test_an_unknown_start_is_refused():
    with pytest.raises(ValueError, match="start is one of batch, incremental"):
        AdaptorSampler(parse_grammar(WORDS), ["ab"], start="random")


@pytest.mark.parametrize("text", [WORDS, NESTED])
@pytest.mark.parametrize("temperature", [1.0, 2.5])
def test_the_tempered_chart_sums_the_weight_of_every_tree(text, temperature):
    # The chart's total is the sum of `weight` over every tree of the sentence, each tree
    # enumerated by brute force, in a state with cached labels (several tables per label
    # once the sampler has run, so the per-table tempered sum matters).
    g = parse_grammar(text)
    sampler = AdaptorSampler(g, ["aab", "ab", "ba", "ab", "aab"], seed=3)
    sampler.run(5)
    cache = sampler.chains[0].cache
    assert any(len(ids) > 1 for labels in cache.labels for ids in labels.values())
    chart = ProposalChart(cache, [g.vocab.index[c] for c in "abab"], temperature)
    brute = math.fsum(chart.weight(t) for t in enumerate_trees(g, "abab"))
    assert chart.total == pytest.approx(brute, rel=1e-12)
