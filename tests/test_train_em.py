"""EM: expected counts against brute-force enumeration, partial brackets (Pereira & Schabes
1992), the M-steps, and monotone likelihood (Dempster, Laird & Rubin 1977)."""

from __future__ import annotations

import json
import math

import pytest
import torch

from test_train_fixtures import base_overrides, brute_force, write_corpus
from treewright.params import TabularParams
from treewright.train import load_train_config, train
from treewright.train.estep import ExpectedCounts, batch_counts, make_batch
from treewright.train import updates


def _rules(seed=0, nt=2, t=2, v=3):
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        return TabularParams(nt, t, v, 1.0, gen, torch.float64).rules()


def test_expected_counts_match_brute_force_enumeration():
    # Reference: brute force, summing over every tree of each sentence.
    rules = _rules()
    sentences = [[0, 2, 1, 1], [2, 0, 1]]
    counts = batch_counts(rules, make_batch([0, 1], sentences, None, torch.float64))
    ref = [brute_force(rules, s) for s in sentences]
    assert counts.loglik == pytest.approx(sum(r[0] for r in ref), abs=1e-10)
    torch.testing.assert_close(counts.root, ref[0][1] + ref[1][1], atol=1e-10, rtol=0)
    torch.testing.assert_close(counts.binary, ref[0][2] + ref[1][2], atol=1e-10, rtol=0)
    torch.testing.assert_close(counts.lexical, ref[0][3] + ref[1][3], atol=1e-10, rtol=0)
    assert counts.words == 7 and counts.unparsed == 0
    # Every word is emitted by exactly one preterminal in every tree (fact of the trade).
    assert float(counts.lexical.sum()) == pytest.approx(7, abs=1e-10)


def test_partial_brackets_restrict_trees_to_those_that_do_not_cross():
    # Pereira & Schabes (1992): only trees compatible with the bracket (1, 3) count.
    # Reference: brute force over the trees whose spans do not cross (1, 3).
    rules = _rules(seed=3)
    words = [1, 0, 2, 1]

    def compatible(spans):
        return not any((i < 1 < j < 3) or (1 < i < 3 < j) for i, j in spans)

    batch = make_batch([0], [words], [[(1, 3)]], torch.float64)
    counts = batch_counts(rules, batch)
    logz, root, binary, lexical, span_mass = brute_force(rules, words, compatible)
    assert counts.loglik == pytest.approx(logz, abs=1e-10)
    torch.testing.assert_close(counts.binary, binary, atol=1e-10, rtol=0)
    torch.testing.assert_close(counts.lexical, lexical, atol=1e-10, rtol=0)
    # The constrained likelihood is a part of the unconstrained one.
    free = batch_counts(rules, make_batch([0], [words], None, torch.float64))
    assert counts.loglik < free.loglik


def test_map_em_is_the_dirichlet_mode_and_alpha_one_is_maximum_likelihood():
    # Reference: the mode of Dirichlet(count + alpha) is (count + alpha - 1) / sum (fact of the
    # trade), worked by hand on a root distribution over three nonterminals.
    rules = _rules(nt=3)
    counts = ExpectedCounts(torch.tensor([2.0, 0.0, 1.0], dtype=torch.float64),
                            torch.zeros_like(rules.binary), torch.zeros_like(rules.lexical),
                            0.0, 0, 0, 0)
    mapped = updates.dirichlet_map(counts, 2.0, rules)
    torch.testing.assert_close(mapped.root.exp(), torch.tensor([3 / 6, 1 / 6, 2 / 6],
                                                               dtype=torch.float64))
    ml = updates.maximum_likelihood(counts, rules)
    torch.testing.assert_close(ml.root.exp(), torch.tensor([2 / 3, 0, 1 / 3],
                                                           dtype=torch.float64))
    torch.testing.assert_close(updates.dirichlet_map(counts, 1.0, rules).root, ml.root)
    # A row with no counts at all keeps its previous distribution under maximum likelihood.
    torch.testing.assert_close(ml.binary, rules.binary)


def test_stepwise_em_rate_is_t_plus_two_to_the_minus_power():
    # Liang & Klein (2009): eta_t = (t + 2)^-alpha; by hand for alpha = 0.7.
    assert updates.stepwise_rate(0, 0.7) == pytest.approx(2 ** -0.7)
    assert updates.stepwise_rate(8, 0.7) == pytest.approx(10 ** -0.7)
    assert updates.stepwise_rate(8, 1.0) == pytest.approx(0.1)


def _metric_series(run_dir, name):
    rows = [json.loads(line) for line in (run_dir / "metrics.jsonl").read_text().splitlines()]
    return [r[name] for r in rows if name in r]


def test_em_never_lowers_the_training_likelihood(tmp_path):
    # Dempster, Laird & Rubin (1977): every EM iteration keeps or raises the likelihood.
    train_path, _ = write_corpus(tmp_path / "data", train=80, dev=0)
    cfg = load_train_config(None, base_overrides(tmp_path, train_path, None,
                                                 **{"train.epochs": 12}))
    trainer = train(cfg, tmp_path / "run")
    series = _metric_series(tmp_path / "run", "train/loglik_per_word")
    assert len(series) == 12
    for before, after in zip(series, series[1:]):
        assert after >= before - 1e-12, series
    assert series[-1] > series[0] + 0.1  # and it does climb
    assert trainer.grammar_path_.exists()


def test_map_em_never_lowers_the_log_posterior(tmp_path):
    # MAP-EM is EM on log p(x | theta) + log p(theta) (Dempster et al. 1977, section 3): the sum
    # of the training log-likelihood and the Dirichlet log-prior never decreases.
    train_path, _ = write_corpus(tmp_path / "data", train=60, dev=0)
    alpha = 1.5
    cfg = load_train_config(None, base_overrides(tmp_path, train_path, None, **{
        "train.epochs": 8, "train.method": "map_em", "prior.concentration": alpha}))
    train(cfg, tmp_path / "run")
    objective = _metric_series(tmp_path / "run", "train/log_posterior")
    assert len(objective) == 8 and all(math.isfinite(x) for x in objective)
    for before, after in zip(objective, objective[1:]):
        assert after >= before - 1e-10, objective
    assert objective[-1] > objective[0]


def test_a_run_that_hits_the_epoch_limit_says_it_did_not_converge(tmp_path):
    # EM's objective is the training log-likelihood per word (for batch EM, of the grammar
    # before each epoch's update); the note gives the last epoch's gain over the one before,
    # read back here from metrics.jsonl. 5 epochs of a fresh random grammar do not converge.
    train_path, _ = write_corpus(tmp_path / "data", train=60, dev=0)
    cfg = load_train_config(None, base_overrides(tmp_path, train_path, None, **{
        "train.restarts": 2, "train.tolerance": 1e-5}))
    train(cfg, tmp_path / "run")
    log = (tmp_path / "run" / "train.log").read_text(encoding="utf-8")
    rows = [json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text()
            .splitlines()]
    for restart in (0, 1):
        series = [r["train/loglik_per_word"] for r in rows
                  if r.get("restart") == restart and "train/loglik_per_word" in r]
        assert len(series) == 5
        assert (f"restart {restart}: stopped at the epoch limit (train.epochs = 5) before "
                f"converging: its last epoch still improved the objective per word by "
                f"{series[-1] - series[-2]:.2g} (train.tolerance = 1e-05)") in log


def test_a_converged_run_and_a_method_that_never_converges_say_nothing_of_the_limit(tmp_path):
    # Nor does a run told never to stop early (tolerance 0, the library's default).
    train_path, _ = write_corpus(tmp_path / "data", train=60, dev=0)
    for name, extra in (("em", {"train.tolerance": 10.0}), ("never", {"train.tolerance": 0}),
                        ("gradient", {"train.method": "gradient", "train.tolerance": 1e-5})):
        folder = tmp_path / name
        cfg = load_train_config(None, base_overrides(folder, train_path, None, **extra))
        train(cfg, folder / "run")
        log = (folder / "run" / "train.log").read_text(encoding="utf-8")
        assert "epoch limit" not in log
        # A tolerance of 10 nats a word is met at the first comparable epoch (epoch 1).
        assert ("restart 0: converged after epoch 1" in log) == (name == "em")
