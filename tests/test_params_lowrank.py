"""The low-rank parameterization (Yang, Zhao & Tu 2021): its factors imply normalized rules, its
log Z, span marginals and expected counts agree with enumeration of every tree, and it trains
end to end into a grammar file that scores sentences as the model did."""

from __future__ import annotations

import json
import math

import pytest
import torch

from test_train_fixtures import base_overrides, brute_force, write_corpus
from treewright.grammar import load_grammar
from treewright.inference import encode_ids, score
from treewright.params import LowRankParams, LowRankRules
from treewright.params.lowrank import dense_binary
from treewright.train import load_train_config, train
from treewright.train.estep import log_partition_of, span_posteriors


def _rules(nt=2, t=3, v=4, rank=3, seed=0) -> LowRankRules:
    model = LowRankParams(nt, t, v, rank, dim=8, blocks=1,
                          generator=torch.Generator().manual_seed(seed), dtype=torch.float64)
    # Xavier-initialised networks give nearly uniform rules; sharpen the embeddings so that the
    # checks below see distinct probabilities.
    with torch.no_grad():
        for p in (model.symbol_embeddings, model.rank_embeddings, model.start_embedding):
            p.mul_(8.0)
        return model.rules()


def test_dense_rules_match_the_definition_and_are_normalized():
    r = LowRankRules(*(x.detach() for x in _rules(nt=3, t=4, rank=5)))
    dense = dense_binary(r.u, r.v, r.w)
    nt, s = 3, 7
    # Brute force: the definition sum_r U[A,r] V[B,r] W[C,r], one entry at a time.
    u, v, w = r.u.exp(), r.v.exp(), r.w.exp()
    for a in range(nt):
        for b in range(s):
            for c in range(s):
                want = sum(float(u[a, k] * v[b, k] * w[c, k]) for k in range(5))
                assert math.isclose(float(dense[a, b, c].exp()), want, rel_tol=1e-12)
    # Every parent's rules sum to one (a PCFG's definition).
    torch.testing.assert_close(dense.exp().sum((1, 2)), torch.ones(nt, dtype=torch.float64))
    torch.testing.assert_close(r.root.exp().sum(), torch.tensor(1.0, dtype=torch.float64))
    torch.testing.assert_close(r.lexical.exp().sum(1), torch.ones(4, dtype=torch.float64))


@pytest.mark.parametrize("words", [[0, 1], [2, 0, 3], [1, 1, 2, 0]])
def test_log_z_spans_and_counts_agree_with_enumeration(words):
    r = _rules()
    dense = r.dense()
    logz_bf, _, counts_bf, _, spans_bf = brute_force(dense, words)
    ids = torch.tensor([words])
    lengths = torch.tensor([len(words)])
    terminal = encode_ids(r.lexical, ids, lengths).terminal
    logz, spans = span_posteriors(r, terminal, lengths)
    assert math.isclose(float(logz[0]), logz_bf, rel_tol=1e-10)
    n = len(words)
    for i in range(n):
        for width in range(2, n - i + 1):
            want = spans_bf.get((i, i + width), 0.0)
            assert math.isclose(float(spans[0, i, width]), want, abs_tol=1e-10), (i, width)
    # Expected binary rule counts: the gradient of log Z with respect to the log-factors, pushed
    # through the dense rules, equals the enumerated counts.
    leaves = [x.detach().requires_grad_() for x in (r.u, r.v, r.w)]
    factored = LowRankRules(r.root, *leaves, r.lexical)
    (g_dense,) = torch.autograd.grad(
        log_partition_of(factored.dense(), terminal, lengths).sum(), [leaves[0]],
        retain_graph=False)
    g_low = torch.autograd.grad(log_partition_of(factored, terminal, lengths).sum(),
                                [leaves[0]])[0]
    torch.testing.assert_close(g_low, g_dense)
    binary = factored.dense().binary.detach().requires_grad_()
    (counts,) = torch.autograd.grad(
        log_partition_of(dense._replace(binary=binary), terminal, lengths).sum(), [binary])
    torch.testing.assert_close(counts, counts_bf)


def test_lowrank_trains_end_to_end_and_its_grammar_file_scores_like_the_model(tmp_path):
    train_path, dev_path = write_corpus(tmp_path / "data", train=80, dev=30)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, dev_path, **{"train.method": "gradient",
                                           "model.parameterization": "lowrank",
                                           "model.rank": 6, "model.embedding_dim": 16,
                                           "train.epochs": 6, "optimizer.lr": 0.05,
                                           "train.batch_size": 10}))
    trainer = train(cfg, tmp_path / "run")
    rows = [json.loads(x) for x in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    dev = [r["dev/loglik_per_word"] for r in rows if "dev/loglik_per_word" in r]
    assert dev[-1] > dev[0] + 0.1, dev          # training improved held-out likelihood
    assert all(math.isfinite(r["dev/sentence_f1"]) for r in rows if "dev/sentence_f1" in r)
    grammar = load_grammar(trainer.grammar_path_)
    # The saved (dense) grammar gives sentences the likelihood the factored model did.
    words = [t.split() for t in (tmp_path / "data" / "train.txt").read_text().splitlines()[:5]]
    model_rules = trainer.current_rules()
    assert isinstance(model_rules, LowRankRules)
    file_scores = [s.logprob for s in score(grammar, words, dtype=torch.float64)]
    ids = torch.tensor([[trainer.data.vocab.index[w] for w in words[0]]])
    lengths = torch.tensor([len(words[0])])
    mine = log_partition_of(model_rules, encode_ids(model_rules.lexical, ids, lengths).terminal,
                            lengths)
    assert math.isclose(file_scores[0], float(mine[0]), rel_tol=1e-8)


def test_a_grammar_over_the_rule_cap_is_saved_with_each_symbols_most_probable_rules(tmp_path):
    # Reference: the model's own dense rules, ranked by Python's sorted() per nonterminal, and
    # the kept mass summed in a plain loop.
    train_path, _ = write_corpus(tmp_path / "data", train=40, dev=0)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, None, **{"train.method": "gradient",
                                       "model.parameterization": "lowrank", "model.rank": 4,
                                       "model.embedding_dim": 8, "train.epochs": 1,
                                       "output.max_saved_rules": 30}))
    trainer = train(cfg, tmp_path / "run")
    grammar = load_grammar(trainer.grammar_path_)
    dense = trainer.current_rules().binary.double().exp()         # (NT, S, S) = (3, 8, 8)
    nt, s, _ = dense.shape
    names = grammar.nonterminals + grammar.preterminals
    assert nt * s * s > 30
    log = (tmp_path / "run" / "train.log").read_text()
    assert "more than output.max_saved_rules (30); saved each nonterminal's 10 most" in log
    removed = []
    for a in range(nt):
        ranked = sorted(((float(dense[a, b, c]), b, c) for b in range(s) for c in range(s)),
                        reverse=True)
        top = ranked[:10]
        kept = {(b, c) for _, b, c in top}
        saved = {(b, c) for b in range(s) for c in range(s)
                 if math.isfinite(float(grammar.binary[a, b, c]))}
        assert saved == kept, names[a]
        mass = sum(p for p, _, _ in top)
        removed.append(1.0 - mass)
        for p, b, c in top:                                    # renormalised over what is kept
            assert math.isclose(math.exp(float(grammar.binary[a, b, c])), p / mass,
                                rel_tol=1e-9)
    worst = max(range(nt), key=lambda a: removed[a])
    assert f"at most {removed[worst]:.4g}, {names[worst]})" in log


def test_lowrank_refuses_em(tmp_path):
    from treewright.errors import InputError
    with pytest.raises(InputError, match="train.method"):
        load_train_config(None, ["data.train=x.txt", "model.parameterization=lowrank",
                                 "train.method=em"])
