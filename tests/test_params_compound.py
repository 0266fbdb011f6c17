"""The compound PCFG (Kim, Dyer & Rush 2019): its KL term, its per-sentence rules against
enumeration of every tree, and training end to end."""

from __future__ import annotations

import json
import math

import torch

from test_train_fixtures import base_overrides, brute_force, write_corpus
from treewright.grammar import load_grammar
from treewright.inference import encode_ids
from treewright.params import CompoundParams
from treewright.params.compound import gaussian_kl
from treewright.train import load_train_config, train
from treewright.train.estep import (compound_log_partition, compound_span_posteriors,
                                    sentence_terminal_scores)


def _model(seed=0):
    return CompoundParams(2, 3, 5, latent_dim=4, dim=8, blocks=1,
                          generator=torch.Generator().manual_seed(seed), dtype=torch.float64)


def test_kl_matches_torch_distributions():
    # Reference: torch.distributions' closed-form KL between Normals (a separate implementation).
    gen = torch.Generator().manual_seed(1)
    mean = torch.randn(6, 4, generator=gen, dtype=torch.float64)
    logvar = torch.randn(6, 4, generator=gen, dtype=torch.float64)
    q = torch.distributions.Normal(mean, (0.5 * logvar).exp())
    p = torch.distributions.Normal(torch.zeros_like(mean), torch.ones_like(mean))
    torch.testing.assert_close(gaussian_kl(mean, logvar),
                               torch.distributions.kl_divergence(q, p).sum(-1))


def test_each_sentence_gets_its_own_rules_and_its_own_exact_likelihood():
    model = _model()
    with torch.no_grad():
        for p in (model.nonterminal_embeddings, model.preterminal_embeddings,
                  model.word_embeddings.weight):
            p.mul_(6.0)
    ids = torch.tensor([[0, 1, 2], [3, 4, 0]])
    lengths = torch.tensor([3, 2])
    with torch.no_grad():
        rules = model.sentence_rules(ids, lengths, torch.Generator().manual_seed(5))
        mean_rules = model.sentence_rules(ids, lengths)
    assert rules.binary.shape == (2, 2, 5, 5)
    assert not torch.allclose(rules.binary[0], rules.binary[1])   # z differs per sentence
    logz = compound_log_partition(rules, ids, lengths)
    logz_mean, spans = compound_span_posteriors(mean_rules, ids, lengths)
    for b, n in enumerate([3, 2]):
        words = ids[b, :n].tolist()
        # Brute force: every tree of the sentence under its own rules.
        assert math.isclose(float(logz[b]), brute_force(rules.sentence(b), words)[0],
                            rel_tol=1e-10)
        bf_mean = brute_force(mean_rules.sentence(b), words)
        assert math.isclose(float(logz_mean[b]), bf_mean[0], rel_tol=1e-10)
        for (i, j), mass in bf_mean[4].items():
            assert math.isclose(float(spans[b, i, j - i]), mass, rel_tol=1e-9)
        torch.testing.assert_close(
            sentence_terminal_scores(rules.lexical, ids)[b],
            encode_ids(rules.lexical[b], ids[b:b + 1], lengths[b:b + 1]).terminal[0])
    # The grammar at z = 0 is a proper PCFG: every distribution sums to one.
    r0 = model.rules()
    torch.testing.assert_close(r0.binary.exp().sum((1, 2)), torch.ones(2, dtype=torch.float64))
    torch.testing.assert_close(r0.lexical.exp().sum(1), torch.ones(3, dtype=torch.float64))


def test_compound_trains_end_to_end(tmp_path):
    train_path, dev_path = write_corpus(tmp_path / "data", train=60, dev=20)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, dev_path, **{"train.method": "gradient",
                                           "model.parameterization": "compound",
                                           "model.latent_dim": 4, "model.embedding_dim": 16,
                                           "train.epochs": 5, "optimizer.lr": 0.05,
                                           "train.batch_size": 10}))
    trainer = train(cfg, tmp_path / "run")
    rows = [json.loads(x) for x in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    dev = [r["dev/loglik_per_word"] for r in rows if "dev/loglik_per_word" in r]
    assert dev[-1] > dev[0] + 0.1, dev
    epochs = [r for r in rows if "train/elbo_per_word" in r]
    assert epochs and all(r["train/elbo_per_word"] <= r["train/loglik_per_word"] for r in epochs)
    assert all(r["train/kl_per_word"] >= 0 for r in epochs)
    load_grammar(trainer.grammar_path_)    # the z = 0 grammar is a valid grammar file
