"""Mean-field variational Bayes (Kurihara & Sato 2004): the digamma weights against SciPy, the
Dirichlet KL against Monte Carlo, and an evidence lower bound that never decreases."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from scipy import special, stats

from test_train_fixtures import base_overrides, write_corpus
from treewright.params.tabular import RuleTensors
from treewright.train import load_train_config, train
from treewright.train import updates


def _posterior():
    gen = torch.Generator().manual_seed(0)
    return RuleTensors(torch.rand(3, generator=gen, dtype=torch.float64) * 3 + 0.2,
                       torch.rand(3, 5, 5, generator=gen, dtype=torch.float64) * 2 + 0.1,
                       torch.rand(2, 4, generator=gen, dtype=torch.float64) * 4 + 0.3)


def test_vb_weights_are_exp_digamma_differences():
    # Reference: scipy.special.digamma; pi~ = exp(psi(a_k) - psi(sum_k a_k)) per row.
    post = _posterior()
    weights = updates.vb_log_weights(post)
    lex = post.lexical.numpy()
    expected = special.digamma(lex) - special.digamma(lex.sum(1, keepdims=True))
    np.testing.assert_allclose(weights.lexical.numpy(), expected, atol=1e-12)
    rows = post.binary.reshape(3, -1).numpy()
    expected = special.digamma(rows) - special.digamma(rows.sum(1, keepdims=True))
    np.testing.assert_allclose(weights.binary.reshape(3, -1).numpy(), expected, atol=1e-12)
    # Sub-normalized: each row of weights sums to less than one (Jensen; fact of the trade).
    assert float(weights.root.exp().sum()) < 1


def test_dirichlet_kl_matches_monte_carlo():
    # Reference: KL(q || p) = E_q[log q - log p], estimated with scipy.stats.dirichlet samples
    # (seeded, 200k draws) on a root row; alpha = 0.5.
    post = _posterior()
    q = post.root.numpy()
    alpha = 0.5
    only_root = RuleTensors(post.root, torch.ones(1, 1, 1, dtype=torch.float64) * alpha,
                            torch.ones(1, 1, dtype=torch.float64) * alpha)
    kl = updates.dirichlet_kl(only_root, alpha)  # the one-outcome rows contribute 0
    draws = stats.dirichlet(q).rvs(200_000, random_state=np.random.default_rng(1))
    draws = np.clip(draws, 1e-300, None)
    mc = np.mean(stats.dirichlet(q).logpdf(draws.T) - stats.dirichlet([alpha] * 3)
                 .logpdf(draws.T))
    assert kl == pytest.approx(mc, abs=0.02)


def test_elbo_never_decreases(tmp_path):
    # Coordinate ascent on the mean-field bound (Kurihara & Sato 2004): each iteration keeps or
    # raises the ELBO, here with a sparse prior alpha = 0.3.
    train_path, _ = write_corpus(tmp_path / "data", train=80, dev=0)
    cfg = load_train_config(None, base_overrides(tmp_path, train_path, None, **{
        "train.method": "vb", "prior.concentration": 0.3, "train.epochs": 10}))
    train(cfg, tmp_path / "run")
    rows = [json.loads(x) for x in (tmp_path / "run/metrics.jsonl").read_text().splitlines()]
    elbo = [r["train/elbo"] for r in rows if "train/elbo" in r]
    assert len(elbo) == 9  # defined from the second iteration, once q(theta) exists
    for before, after in zip(elbo, elbo[1:]):
        assert after >= before - 1e-9, elbo
    assert elbo[-1] > elbo[0]
    # ELBO = log Z~ - KL(q || prior) and KL >= 0 (Gibbs' inequality), so the bound lies below
    # the log Z~ under the digamma weights that is logged beside it.
    lls = [r["train/loglik_per_word"] for r in rows if "train/elbo" in r]
    assert all(e <= ll + 1e-12 for e, ll in zip(
        [r["train/elbo_per_word"] for r in rows if "train/elbo" in r], lls))
