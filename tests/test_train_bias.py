"""The structural bias on edge spans (after Smith & Eisner 2006, "Annealing Structural Bias in
Multilingual Weighted Grammar Induction"): which spans it weights, how it anneals, and that a
strong right-edge bias keeps training's posterior mass off right-edge spans."""

from __future__ import annotations

import math

import torch

from test_train_fixtures import base_overrides, write_corpus
from treewright.train import load_train_config
from treewright.train.estep import edge_bias
from treewright.train.loop import Trainer


def test_edge_bias_weights_exactly_the_edge_spans():
    lengths = torch.tensor([5, 3])
    pot = edge_bias(lengths, 5, right_edge=-2.0, left_edge=-0.5, dtype=torch.float64)
    for b, n in enumerate([5, 3]):
        for i in range(6):
            for w in range(6):
                j = i + w
                # Brute force over every [start, width] cell, from the definition.
                want = 0.0
                if 2 <= w < n and j <= n:
                    if j == n:
                        want += -2.0
                    if i == 0:
                        want += -0.5
                assert float(pot[b, i, w]) == want, (b, i, w)


def test_bias_anneals_linearly_and_reaches_the_batches(tmp_path):
    train_path, dev_path = write_corpus(tmp_path / "data", train=20, dev=5)
    cfg = load_train_config(None, base_overrides(tmp_path, train_path, dev_path,
                                                 **{"bias.right_edge": -4.0,
                                                    "bias.anneal_epochs": 4}))
    trainer = Trainer(cfg, tmp_path / "run")
    assert [trainer.bias_scale(e) for e in range(6)] == [1.0, 0.75, 0.5, 0.25, 0.0, 0.0]
    from treewright.train.loop import load_data
    trainer.data = load_data(cfg)
    trainer.epoch_ = 1
    batch = trainer._batch([0, 1, 2])
    n = int(batch.ids.shape[1])
    want = edge_bias(batch.lengths, n, -3.0, 0.0, torch.float64)
    torch.testing.assert_close(batch.span_pot, want)
    trainer.epoch_ = 4
    assert trainer._batch([0, 1, 2]).span_pot is None


def test_a_strong_right_edge_bias_moves_posterior_mass_off_right_edge_spans():
    # Engine-level check: the E-step's span marginals under the bias (reference: with a
    # log-weight of -30, right-edge spans keep at most e^-30 of their relative mass).
    from treewright import engine
    gen = torch.Generator().manual_seed(3)
    nt, t, n = 3, 4, 5
    root = torch.randn(nt, generator=gen, dtype=torch.float64).log_softmax(0)
    binary = torch.randn(nt, (nt + t) ** 2, generator=gen,
                         dtype=torch.float64).log_softmax(1).view(nt, nt + t, nt + t)
    terminal = torch.randn(1, n, t, generator=gen, dtype=torch.float64)
    lengths = torch.tensor([n])
    free = engine.posteriors(root, binary, terminal, lengths).spans
    biased = engine.posteriors(root, binary, terminal, lengths,
                               span_pot=edge_bias(lengths, n, -30.0, 0.0, torch.float64)).spans
    right_edge = [(i, n - i) for i in range(1, n - 1)]
    assert sum(float(free[0, i, w]) for i, w in right_edge) > 0.1
    assert all(float(biased[0, i, w]) < 1e-10 for i, w in right_edge)
    assert math.isclose(float(biased[0, 0, n]), 1.0, rel_tol=1e-9)   # the whole sentence
