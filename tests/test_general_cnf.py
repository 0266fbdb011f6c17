"""General CNF grammars with no pure preterminal (every symbol that emits words also has binary
rules), the form of Lari & Young 1990, "The estimation of stochastic context-free grammars
using the Inside-Outside algorithm". The engine sees T = 0 preterminals; every check is against
brute-force enumeration of every tree (tests/_brute.py) or the engine's reference pass."""

from __future__ import annotations

import argparse
import json
import math

import pytest
import torch
from scipy.stats import chisquare

from _brute import summary
from _grammars import random_grammar
from treewright import engine
from treewright.cli import parse as parse_cmd
from treewright.cli import score as score_cmd
from treewright.decode import decode
from treewright.engine.reference import reference_inside
from treewright.grammar import parse_grammar
from treewright.inference import encode, posterior_samples, spans_to_tree, tree_logprob

LARI_YOUNG = '@start S\nS -> S S 0.4\nS -> "w" 0.6\n'


def _args(grammar, sentences):
    enc = encode(grammar, sentences, torch.float64)
    return grammar.root, grammar.binary, enc.terminal, enc.lengths, enc.nt_terminal


def _grammars():
    # Two nonterminals that both emit and rewrite, and the one-symbol grammar of the issue.
    return [random_grammar(2, 0, 3, seed=4, nt_emit=True), parse_grammar(LARI_YOUNG)]


def test_the_grammar_has_no_preterminal():
    g = parse_grammar(LARI_YOUNG)
    assert g.preterminals == [] and g.nonterminals == ["S"] and g.nonterminals_emit


@pytest.mark.parametrize("which", [0, 1])
@pytest.mark.parametrize("n", [1, 2, 4, 5])
def test_log_z_counts_spans_and_best_tree_match_enumeration(which, n):
    g = _grammars()[which]
    gen = torch.Generator().manual_seed(n)
    words = [g.vocab.words[int(i)] for i in torch.randint(len(g.vocab), (n,), generator=gen)]
    brute = summary(g, words)  # Reference: every tree enumerated.
    args = _args(g, [words])
    post = engine.posteriors(*args)
    assert float(post.logz[0]) == pytest.approx(brute["logz"], rel=1e-10)
    assert float(reference_inside(*args)[0]) == pytest.approx(brute["logz"], rel=1e-10)
    torch.testing.assert_close(post.binary, brute["counts"], atol=1e-10, rtol=1e-8)
    torch.testing.assert_close(post.spans[0], brute["spans"], atol=1e-10, rtol=1e-8)
    torch.testing.assert_close(post.nt_terminal[0], brute["term"], atol=1e-10, rtol=1e-8)
    assert post.terminal.shape == (1, n, 0)
    (score, spans), = engine.viterbi(*args)
    best_lp, best_spans, _ = brute["best"]
    assert score == pytest.approx(best_lp, rel=1e-10)
    # Ties (Lari & Young's grammar gives every bracketing the same probability) may pick any
    # best tree: check the tree's own probability rather than its shape there.
    assert tree_logprob(g, spans_to_tree(g, words, spans)) == pytest.approx(best_lp, rel=1e-10)
    if which == 0:
        assert sorted(spans) == sorted(best_spans)


def test_lari_young_three_words_by_hand():
    # Hand-worked: "w w w" has two trees, each 0.4^2 * 0.6^3, so log Z = log(2 * 0.03456).
    g = parse_grammar(LARI_YOUNG)
    logz = engine.log_partition(*_args(g, [["w"] * 3]))
    assert float(logz[0]) == pytest.approx(math.log(2 * 0.4 ** 2 * 0.6 ** 3), rel=1e-12)


def test_fast_path_matches_the_reference_values_and_gradients_with_no_preterminal():
    # Reference: reference_inside, the plain log-space pass with autograd gradients.
    gen = torch.Generator().manual_seed(11)
    nt, B, N = 3, 3, 6
    dt = torch.float64
    root = torch.randn(nt, generator=gen, dtype=dt).log_softmax(0)
    binary = torch.randn(nt, nt * nt, generator=gen, dtype=dt).log_softmax(-1).view(nt, nt, nt)
    terminal = torch.zeros(B, N, 0, dtype=dt)
    nt_terminal = torch.randn(B, N, nt, generator=gen, dtype=dt) - 2
    lengths = torch.tensor([N, 3, 1])

    def run(fn):
        leaves = [x.clone().requires_grad_() for x in (root, binary, nt_terminal)]
        z = fn(leaves[0], leaves[1], terminal, lengths, leaves[2])
        (z * torch.arange(1, B + 1, dtype=dt)).sum().backward()
        return z.detach(), [x.grad for x in leaves]

    z, grads = run(engine.log_partition)
    z_ref, grads_ref = run(reference_inside)
    torch.testing.assert_close(z, z_ref, rtol=1e-10, atol=1e-10)
    for g, g_ref in zip(grads, grads_ref):
        torch.testing.assert_close(g, g_ref, rtol=1e-9, atol=1e-10)


def test_samples_follow_the_exact_posterior():
    # Chi-square goodness of fit of 3,000 draws against the enumerated posterior (fixed seed).
    g = _grammars()[0]
    words = ["w0", "w2", "w1", "w0"]
    brute = summary(g, words)
    exact = {tuple(sorted(s)): math.exp(lp - brute["logz"]) for lp, s, _ in brute["trees"]}
    draws = 3000
    trees = posterior_samples(g, [words], draws, seed=3)[0]
    names = g.symbols
    observed = {key: 0 for key in exact}
    for tree in trees:
        spans = [(i, j, names.index(label)) for i, j, label in tree.labeled_spans()]
        observed[tuple(sorted(spans))] += 1  # a KeyError would be a tree that cannot exist
    keys = [k for k in exact if exact[k] * draws >= 5]
    rest = [k for k in exact if exact[k] * draws < 5]
    obs = [observed[k] for k in keys] + [sum(observed[k] for k in rest)]
    exp = [exact[k] * draws for k in keys] + [sum(exact[k] for k in rest) * draws]
    assert len(keys) >= 10
    assert chisquare(obs, exp).pvalue > 0.001


def test_mbr_and_max_rule_product_match_enumeration():
    # Reference: span marginals from the tree list; for max-rule-product on an unrefined
    # grammar, anchored rule posteriors from the tree list (Petrov & Klein 2007, section 3).
    g = _grammars()[0]
    for words in (["w0", "w1"], ["w2", "w0", "w1"], ["w1", "w1", "w0", "w2"]):
        brute = summary(g, words)
        trees = brute["trees"]
        result = decode(g, [words], "mbr")[0]
        got = {(i, j) for i, j, _ in result.tree.labeled_spans() if j - i >= 2}
        assert sum(float(brute["spans"][i, j - i]) for i, j in got) == \
            pytest.approx(result.score, abs=1e-10)
        assert result.log_likelihood == pytest.approx(brute["logz"], abs=1e-10)
        best_gain = max(sum(float(brute["spans"][i, j - i]) for i, j, _ in s if j - i >= 2)
                        for _, s, _ in trees)
        assert result.score == pytest.approx(best_gain, abs=1e-10)
        mrp = decode(g, [words], "max-rule-product")[0]
        assert mrp.tree.leaves() == words
        assert mrp.tree_logprob == pytest.approx(tree_logprob(g, mrp.tree), abs=1e-10)
        assert mrp.score == pytest.approx(_best_rule_product(g, words, trees, brute), abs=1e-9)


def _best_rule_product(g, words, trees, brute):
    """max over trees of the product of its anchored rule posteriors, from the tree list."""
    z = brute["logz"]
    anchored: dict = {}
    for lp, spans, _ in trees:
        p = math.exp(lp - z)
        for key in _anchored_rules(spans):
            anchored[key] = anchored.get(key, 0.0) + p
    return max(sum(math.log(anchored[k]) for k in _anchored_rules(spans))
               for _, spans, _ in trees)


def _anchored_rules(spans):
    """The anchored rules of one tree given by its spans: the top, each binary node with its
    split and child labels, each word's label."""
    label = {(i, j): a for i, j, a in spans}
    n = max(j for _, j, _ in spans)
    out = [("top", label[(0, n)])]
    for (i, j), a in label.items():
        if j - i == 1:
            out.append(("word", i, a))
            continue
        k = next(k for k in range(i + 1, j) if (i, k) in label and (k, j) in label)
        out.append(("bin", i, k, j, a, label[(i, k)], label[(k, j)]))
    return out


def _run(module, argv) -> int:
    parser = argparse.ArgumentParser()
    module.add_arguments(parser)
    return module.run(parser.parse_args([str(a) for a in argv]))


def test_cli_score_and_parse_on_a_grammar_without_preterminals(tmp_path, capsys):
    grammar = tmp_path / "lari_young.pcfg"
    grammar.write_text(LARI_YOUNG, encoding="utf-8")
    text = tmp_path / "s.txt"
    text.write_text("w w w\nw\nw w\n", encoding="utf-8")
    assert _run(score_cmd, [grammar, text, "--float64"]) == 0
    lines = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    g = parse_grammar(LARI_YOUNG)
    for record, words in zip(lines, (["w"] * 3, ["w"], ["w"] * 2)):
        # Reference: brute-force enumeration of every tree.
        assert record["logprob"] == pytest.approx(summary(g, words)["logz"], rel=1e-12)
    for decoder in ("viterbi", "mbr", "max-rule-product"):
        assert _run(parse_cmd, [grammar, text, "--decoder", decoder]) == 0
        out = capsys.readouterr().out.splitlines()
        assert out[1:] == ["(S w)", "(S (S w) (S w))"]
        # Common practice: the three words in one binary tree of S nodes, either bracketing.
        assert out[0] in ("(S (S w) (S (S w) (S w)))", "(S (S (S w) (S w)) (S w))")


def test_low_rank_engine_with_no_preterminal_matches_the_reference():
    # Reference: reference_inside on the dense rules the factors imply, with autograd.
    from treewright.engine.lowrank import dense_binary, lowrank_log_partition
    gen = torch.Generator().manual_seed(2)
    dt = torch.float64
    nt, rank = 3, 4
    u = torch.randn(nt, rank, generator=gen, dtype=dt).log_softmax(1)
    v = torch.randn(nt, rank, generator=gen, dtype=dt).log_softmax(0)
    w = torch.randn(nt, rank, generator=gen, dtype=dt).log_softmax(0)
    root = torch.randn(nt, generator=gen, dtype=dt).log_softmax(0)
    terminal = torch.zeros(2, 5, 0, dtype=dt)
    nt_terminal = (torch.randn(2, 5, nt, generator=gen, dtype=dt) - 1).requires_grad_()
    lengths = torch.tensor([5, 3])
    z = lowrank_log_partition(root, u, v, w, terminal, lengths, nt_terminal)
    (grad,) = torch.autograd.grad(z.sum(), nt_terminal)
    leaf = nt_terminal.detach().clone().requires_grad_()
    z_ref = reference_inside(root, dense_binary(u, v, w), terminal, lengths, leaf)
    (grad_ref,) = torch.autograd.grad(z_ref.sum(), leaf)
    torch.testing.assert_close(z.detach(), z_ref.detach(), rtol=1e-10, atol=1e-10)
    torch.testing.assert_close(grad, grad_ref, rtol=1e-9, atol=1e-10)
