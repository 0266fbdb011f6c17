"""Slice sampling of the Pitman-Yor discount and concentration (Johnson & Goldwater 2009)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from test_adaptor import NESTED, WORDS
from treewright.adaptor import AdaptorSampler
from treewright.adaptor.hyper import log_partition_probability, resample, slice_sample
from treewright.grammar import parse_grammar


def _draws(log_density, x, lower, upper, width, n=6000, thin=6, seed=0):
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n):
        x = slice_sample(log_density, x, rng, width=width, lower=lower, upper=upper)
        if k % thin == thin - 1:
            out.append(x)
    return np.array(out)


@pytest.mark.parametrize("dist,lower,upper,width,start", [
    (stats.beta(2, 5), 0.0, 1.0, 0.1, 0.5),        # bounded on both sides, narrow steps
    (stats.gamma(3, scale=2.0), 0.0, math.inf, 1.0, 1.0),  # a long right tail
    (stats.norm(1.0, 0.5), -math.inf, math.inf, 5.0, -3.0),  # steps wider than the density
], ids=["beta", "gamma", "normal"])
def test_slice_sampler_draws_the_density(dist, lower, upper, width, start):
    # Kolmogorov-Smirnov test (scipy.stats.kstest) of 1,000 draws (every sixth update kept)
    # against the density's own distribution function; a shifted distribution must fail.
    draws = _draws(dist.logpdf, start, lower, upper, width)
    assert stats.kstest(draws, dist.cdf).pvalue > 1e-3
    shifted = draws + 0.25 * dist.std()
    assert stats.kstest(shifted, dist.cdf).pvalue < 1e-3


def _set_partitions(items):
    """Every partition of `items` into non-empty blocks (brute force)."""
    if not items:
        yield []
        return
    first, rest = items[0], items[1:]
    for partition in _set_partitions(rest):
        yield [[first]] + partition
        for k in range(len(partition)):
            yield partition[:k] + [[first] + partition[k]] + partition[k + 1:]


@pytest.mark.parametrize("a,b", [(0.0, 1.0), (0.5, 10.0), (0.3, -0.2), (0.9, 0.05)])
def test_partition_probability_sums_to_one_over_every_partition(a, b):
    # The Pitman-Yor partition probability is a distribution over the partitions of n
    # customers (Pitman 1995): summed over the 52 partitions of 5 (enumerated), it is 1.
    partitions = list(_set_partitions(list(range(5))))
    assert len(partitions) == 52  # the Bell number B5
    total = math.fsum(math.exp(log_partition_probability([len(b_) for b_ in p], a, b))
                      for p in partitions)
    assert total == pytest.approx(1.0, rel=1e-12)


def test_partition_probability_is_what_the_sampler_seats_by():
    # log_joint seats every customer by the sequential Pitman-Yor rule; changing (a, b)
    # changes it by exactly the change of the partition probability of each restaurant.
    g = parse_grammar(NESTED)
    sampler = AdaptorSampler(g, ["aab", "abba", "ab", "aa", "ba"], seed=2)
    sampler.run(3)
    chain = sampler.chains[0]
    before = chain.log_joint()
    old = chain.rules.discount.copy(), chain.rules.concentration.copy()
    counts = {a: [t.count for t in chain.cache.tables.values() if t.symbol == a]
              for a in chain.rules.adapted_ids}
    new = old[0].copy(), old[1].copy()
    for a in chain.rules.adapted_ids:
        new[0][a], new[1][a] = 0.4, 2.5
    chain._set_hyperparameters(*new)
    expected = sum(log_partition_probability(counts[a], 0.4, 2.5)
                   - log_partition_probability(counts[a], old[0][a], old[1][a])
                   for a in chain.rules.adapted_ids)
    assert chain.log_joint() - before == pytest.approx(expected, rel=1e-9, abs=1e-9)


def test_resampled_hyperparameters_follow_their_posterior():
    # One restaurant of fixed counts: alternating slice updates of a and b sample the
    # posterior of (a, b), whose a-marginal is computed here by quadrature over a grid (the
    # Gamma prior times the partition probability, integrated over b). Checked by a
    # Kolmogorov-Smirnov test of the a draws against the grid's distribution function.
    counts = [5, 3, 1, 1, 1, 2]
    a_ = np.linspace(0.0005, 0.9995, 1000)[:, None]  # (A, 1)
    b_ = np.linspace(0.005, 6.0, 1200)[None, :]      # (1, B)
    # The partition probability written out again over the grid (numpy, the module docstring's
    # formula), times the Gamma(10, scale 0.1) prior of b: (A, B).
    k, n = len(counts), sum(counts)
    log_post = 9.0 * np.log(b_) - b_ / 0.1
    log_post = log_post + sum(np.log(b_ + t * a_) for t in range(1, k))
    log_post = log_post + sum(np.log(j - a_) for c in counts for j in range(1, c))
    log_post = log_post - sum(np.log(b_ + i) for i in range(1, n))
    grid_a = a_[:, 0]
    marginal = np.exp(log_post - log_post.max()).sum(1)
    cdf = np.cumsum(marginal) / marginal.sum()
    rng = np.random.default_rng(1)
    a, b, draws = 0.5, 1.0, []
    for k in range(6000):
        a, b = resample(counts, a, b, rng)
        if k % 6 == 5:
            draws.append(a)
    assert stats.kstest(draws, lambda x: np.interp(x, grid_a, cdf)).pvalue > 1e-3
    # The prior alone (uniform a) must be rejected: the seating moved the draws (measured
    # p-values above 0.29 against the posterior and below 1e-57 against the prior, seeds 2-4).
    assert stats.kstest(draws, "uniform").pvalue < 1e-3
    with pytest.raises(ValueError):
        resample(counts, 0.0, 1.0, rng)


def test_a_resampling_run_resumes_bit_for_bit(tmp_path):
    g = parse_grammar(WORDS)
    sentences = ["abab", "ab", "ba", "abba"]
    straight = AdaptorSampler(g, sentences, chains=2, seed=4)
    straight.run(8, hyperparameters=True)
    halves = AdaptorSampler(g, sentences, chains=2, seed=4)
    halves.run(3, hyperparameters=True)
    halves.save(tmp_path / "chains.json")
    resumed = AdaptorSampler.load(tmp_path / "chains.json")
    resumed.run(5, hyperparameters=True)
    assert resumed.state() == straight.state()
    word = g.symbols.index("Word")
    values = [(c["discount"][word], c["concentration"][word])
              for c in json.loads(json.dumps(straight.state()))["chains"]]
    # Each chain moved its own values away from the grammar's (0.3, 1), inside the support.
    assert values[0] != values[1] and (0.3, 1.0) not in values
    assert all(0 < a < 1 and b > 0 for a, b in values)
