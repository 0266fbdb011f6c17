"""The bilexicalized PCFG engine (Yang, Zhao & Tu 2021) against brute-force enumeration of every
lexicalized tree (tests/_brute.py: every bracketing, every head choice, every labelling)."""

from __future__ import annotations

import math

import pytest
import torch

from _brute import lexicalized_summary
from treewright.engine.lexicalized import (LexicalizedFactors, heads_from_spans,
                                           lexicalized_log_partition, lexicalized_marginals,
                                           lexicalized_viterbi)

FIELDS = ("root", "head", "head_child", "dep_child", "dep_word", "terminal")


def random_factors(lengths, nt, t, r, seed, terminal=True) -> LexicalizedFactors:
    """Random normalised factors (float64) for a padded batch: the sizes of the model, with
    values spread wide enough that no two derivations tie."""
    gen = torch.Generator().manual_seed(seed)
    B, N, s = len(lengths), max(lengths), nt + t

    def logits(*shape):
        return 2.0 * torch.randn(*shape, generator=gen, dtype=torch.float64)

    head_child = torch.log_softmax(logits(r, 2 * s), -1).view(r, 2, s)
    return LexicalizedFactors(
        root=torch.log_softmax(logits(B, N, s), -1),
        head=torch.log_softmax(logits(B, N, nt, r), -1),
        head_child=head_child,
        dep_child=torch.log_softmax(logits(r, s), -1),
        dep_word=torch.log_softmax(logits(B, N, r), -1),
        terminal=logits(B, N, t) if terminal else None)


def is_projective_tree(heads: list[int]) -> bool:
    """One root, no cycle, and no crossing arc: every word between a head and its dependent
    descends from that head (the textbook definition of projectivity; common practice)."""
    n = len(heads)
    if sum(h == 0 for h in heads) != 1:
        return False

    def ancestors(d):
        seen, k = [], d
        while heads[k - 1] != 0:
            k = heads[k - 1]
            if k in seen or len(seen) > n:
                return None
            seen.append(k)
        return seen

    for d in range(1, n + 1):
        h = heads[d - 1]
        if ancestors(d) is None:
            return False
        if h == 0:
            continue
        for between in range(min(h, d) + 1, max(h, d)):
            if h not in ancestors(between):
                return False
    return True


CASES = [  # (lengths of one padded batch, NT, T, R, seed)
    ([5, 3, 1], 2, 2, 2, 0),
    ([4, 2, 4, 1], 3, 2, 3, 1),
    ([3, 2], 2, 3, 4, 2),
]


@pytest.mark.parametrize("lengths,nt,t,r,seed", CASES)
def test_log_partition_and_expected_counts_match_enumeration(lengths, nt, t, r, seed):
    factors = random_factors(lengths, nt, t, r, seed)
    leaves = LexicalizedFactors(*(x.clone().requires_grad_() for x in factors))
    logz = lexicalized_log_partition(leaves, torch.tensor(lengths))
    for b, n in enumerate(lengths):
        brute = lexicalized_summary(factors, b, n)
        # Reference: the sum over every lexicalized tree, enumerated (tests/_brute.py).
        assert math.isclose(float(logz[b].detach()), brute["logz"], rel_tol=0, abs_tol=1e-9)
        # d log Z / d log-weight = the weight's expected count (Eisner 2016); the reference is
        # the posterior-weighted count from the same enumeration, latent classes spread by each
        # node's posterior. Padded positions (beyond n) must get nothing.
        grads = torch.autograd.grad(logz[b], list(leaves), retain_graph=True)
        for name, grad in zip(FIELDS, grads):
            per_sentence = name not in ("head_child", "dep_child")
            got = grad[b] if per_sentence else grad
            torch.testing.assert_close(got, brute["counts"][name], rtol=0, atol=1e-9,
                                       msg=f"{name}, sentence {b}")
            if per_sentence:   # other sentences' factors are untouched by this log Z
                others = torch.cat([grad[:b], grad[b + 1:]])
                assert float(others.abs().max()) == 0.0


def test_counts_are_counts():
    # Every tree over n words has n - 1 binary nodes, n leaves and one root (common practice):
    # the expected counts sum to that (the enumeration above checks them entry by entry).
    lengths = [5, 2]
    factors = random_factors(lengths, 2, 2, 3, 7)
    leaves = LexicalizedFactors(*(x.clone().requires_grad_() for x in factors))
    logz = lexicalized_log_partition(leaves, torch.tensor(lengths))
    for b, n in enumerate(lengths):
        g = dict(zip(FIELDS, torch.autograd.grad(logz[b], list(leaves), retain_graph=True)))
        assert math.isclose(float(g["root"].sum()), 1.0, abs_tol=1e-9)
        assert math.isclose(float(g["terminal"].sum()), n, abs_tol=1e-9)
        for name in ("head", "head_child", "dep_child", "dep_word"):
            assert math.isclose(float(g[name].sum()), n - 1, abs_tol=1e-9), name


@pytest.mark.parametrize("lengths,nt,t,r,seed", CASES + [([5, 5, 4], 2, 2, 3, 11)])
def test_viterbi_matches_the_best_enumerated_derivation(lengths, nt, t, r, seed):
    factors = random_factors(lengths, nt, t, r, seed)
    parses = lexicalized_viterbi(factors, torch.tensor(lengths))
    for b, n in enumerate(lengths):
        brute = lexicalized_summary(factors, b, n)
        parse = parses[b]
        # Reference: the best (tree, latent classes) pair of the enumeration.
        assert math.isclose(parse.score, brute["best_score"], rel_tol=0, abs_tol=1e-9)
        assert parse.spans == brute["best_spans"]
        # Heads read from the enumerated tree's own nodes (each dependent's head recorded when
        # the node was built) against those read off the decoded spans.
        assert parse.heads == brute["best_heads"]
        assert is_projective_tree(parse.heads)


@pytest.mark.parametrize("side", ["first", "last"])
def test_viterbi_and_log_z_under_the_word_piece_constraint_match_enumeration(side):
    # Reference: the enumeration over the trees the constraint allows, by its definition (no
    # span of two or more words starts at a barred position with the host first, or ends just
    # before one with the host last), and the best derivation among them.
    from treewright.word_pieces import piece_mask
    lengths, barred = [5, 4, 5], [[1, 3], [2], []]
    factors = random_factors(lengths, 2, 2, 3, 12)
    pot = piece_mask(side, barred, max(lengths), torch.float64)
    parses = lexicalized_viterbi(factors, torch.tensor(lengths), pot)
    logz = lexicalized_log_partition(factors, torch.tensor(lengths), span_pot=pot)
    changed = 0
    for b, n in enumerate(lengths):
        def allowed(spans, b=b):
            return not any((i if side == "first" else j) in barred[b] for i, j in spans)
        brute = lexicalized_summary(factors, b, n, allowed)
        assert math.isclose(float(logz[b]), brute["logz"], rel_tol=0, abs_tol=1e-9)
        assert math.isclose(parses[b].score, brute["best_score"], rel_tol=0, abs_tol=1e-9)
        assert parses[b].spans == brute["best_spans"]
        assert parses[b].heads == brute["best_heads"]
        changed += parses[b].spans != lexicalized_summary(factors, b, n)["best_spans"]
    assert changed >= 1      # the constraint moved a best derivation


def test_heads_from_every_enumerated_tree_are_projective():
    # A fact of the trade (common practice): the heads of a lexicalized binary tree form a
    # projective dependency tree. Checked on every tree over five words.
    from _brute import lexicalized_trees
    for _, _, nodes, leaves in lexicalized_trees(5, 1, 1):
        spans = [(i, j, a, h) for i, j, a, h, *_ in nodes] + [(i, i + 1, k, i) for i, k in leaves]
        heads = heads_from_spans(spans, 5)
        recorded = [0] * 5
        for *_, h, _, _, _, dh in nodes:
            recorded[dh] = h + 1
        assert heads == recorded
        assert is_projective_tree(heads)


def test_projectivity_checker_rejects_crossing_arcs():
    # Hand-made examples (common practice): 2 <- 1 -> 3 is projective; 1 -> 3 with 2 headed
    # by 4 crosses; a cycle is no tree.
    assert is_projective_tree([0, 1, 1])
    assert not is_projective_tree([0, 4, 1, 1])
    assert not is_projective_tree([2, 1, 0])


def test_span_head_marginals_match_enumeration():
    lengths = [4, 3]
    factors = random_factors(lengths, 2, 2, 2, 5)
    logz, marginals = lexicalized_marginals(factors, torch.tensor(lengths))
    from _brute import lexicalized_trees
    for b, n in enumerate(lengths):
        brute = lexicalized_summary(factors, b, n)
        assert math.isclose(float(logz[b]), brute["logz"], abs_tol=1e-9)
        # Reference: the posterior mass of each (span, head, symbol) summed over the
        # enumerated trees that contain it (probabilities recomputed from the counts' source).
        expected = {}
        total = 0.0
        for a, h, nodes, leaves in lexicalized_trees(n, 2, 2):
            p = _tree_probability(factors, b, a, h, nodes, leaves)
            total += p
            for i, j, a_, h_, *_ in nodes:
                expected[i, j, a_, h_] = expected.get((i, j, a_, h_), 0.0) + p
            for i, k in leaves:
                expected[i, i + 1, k, i] = expected.get((i, i + 1, k, i), 0.0) + p
        assert math.isclose(math.log(total), brute["logz"], abs_tol=1e-9)
        for w, mark in marginals.items():
            for i in range(n - w + 1):
                for h in range(w):
                    for k in range(mark.shape[-1]):
                        symbol = k + 2 if w == 1 else k
                        want = expected.get((i, i + w, symbol, i + h), 0.0) / total
                        assert math.isclose(float(mark[b, i, h, k]), want, abs_tol=1e-9)


def test_head_potentials_weight_every_constituent_by_its_head():
    # Reference: the enumeration of every lexicalized tree, each weighted by the potentials of
    # its (span, head) pairs of width >= 2. A potential of -inf on every pair but those of one
    # dependency tree leaves the sum over that tree's labellings and latent classes alone.
    lengths = [4, 3]
    factors = random_factors(lengths, 2, 2, 2, 9)
    gen = torch.Generator().manual_seed(4)
    B, N = len(lengths), max(lengths)
    pot = torch.randn(B, N + 1, N + 1, N, generator=gen, dtype=torch.float64)
    only = torch.full((B, N + 1, N + 1, N), -math.inf, dtype=torch.float64)
    kept = {0: {(0, 4): 3, (0, 2): 1, (2, 4): 3}, 1: {(0, 3): 0, (1, 3): 1}}  # (i, j) -> head
    for b, spans in kept.items():
        for (i, j), h in spans.items():
            only[b, i, j - i, h - i] = 0.0
    from _brute import lexicalized_trees
    for potentials, allowed in ((pot, None), (only, kept)):
        logz = lexicalized_log_partition(factors, torch.tensor(lengths), head_pot=potentials)
        for b, n in enumerate(lengths):
            terms = []
            for a, h, nodes, leaves in lexicalized_trees(n, 2, 2):
                if allowed is not None and any(allowed[b].get((i, j)) != h_
                                               for i, j, _, h_, *_ in nodes):
                    continue
                extra = sum(float(potentials[b, i, j - i, h_ - i]) for i, j, _, h_, *_ in nodes)
                terms.append(math.log(_tree_probability(factors, b, a, h, nodes, leaves)) + extra)
            assert terms   # the kept heads form a tree of each sentence
            want = float(torch.logsumexp(torch.tensor(terms, dtype=torch.float64), 0))
            assert math.isclose(float(logz[b]), want, rel_tol=0, abs_tol=1e-9)


def _tree_probability(f, b, a, h, nodes, leaves):
    """p(tree, sentence b) by the definition of each rule (sum over the latent class)."""
    nt = f.head.shape[2]
    logp = float(f.root[b, h, a]) + sum(float(f.terminal[b, i, k - nt]) for i, k in leaves)
    for i, j, a_, h_, side, hsym, dsym, dh in nodes:
        logp += float(torch.logsumexp(f.head[b, h_, a_] + f.head_child[:, side, hsym]
                                      + f.dep_child[:, dsym] + f.dep_word[b, dh], 0))
    return math.exp(logp)


def test_no_terminal_scores_and_dead_cells_give_finite_gradients():
    # The paper's model: no preterminal score (terminal=None, i.e. zero). A root that forbids
    # every symbol leaves the sentence without a parse: log Z = -inf, gradients zero, not NaN
    # (the engine's contract, as in engine.inside).
    lengths = [3, 2]
    factors = random_factors(lengths, 2, 2, 2, 3, terminal=False)
    root = factors.root.clone()
    root[1] = float("-inf")
    factors = factors._replace(root=root)
    leaves = LexicalizedFactors(*(None if x is None else x.clone().requires_grad_()
                                  for x in factors))
    logz = lexicalized_log_partition(leaves, torch.tensor(lengths))
    assert logz[1] == float("-inf")
    assert math.isclose(float(logz[0].detach()), lexicalized_summary(factors, 0, 3)["logz"],
                        abs_tol=1e-9)
    ok = torch.isfinite(logz)
    grads = torch.autograd.grad(logz[ok].sum(), [x for x in leaves if x is not None])
    assert all(bool(torch.isfinite(g).all()) for g in grads)


@pytest.mark.parametrize("beta", [0.3, 0.7])
def test_tempered_factors_sum_every_derivation_to_the_power_beta(beta):
    # Reference: the enumeration of every derivation (tree, heads and the latent class at each
    # binary node, tests/_brute.py), each weighted by p(d)^beta. Deterministic annealing
    # (Smith & Eisner 2004) defines log Z_beta = log sum_d p(d)^beta, and its gradient with
    # respect to a log-weight, divided by beta, is that entry's expected count under the
    # posterior proportional to p(d)^beta; the root entries are checked against it.
    from itertools import product

    from _brute import lexicalized_trees
    lengths, nt, t, r = [4, 3], 2, 2, 2
    factors = random_factors(lengths, nt, t, r, 11)
    leaves = LexicalizedFactors(*(x.clone().requires_grad_() for x in factors))
    logz = lexicalized_log_partition(leaves.tempered(beta), torch.tensor(lengths))
    f = factors
    for b, n in enumerate(lengths):
        scores, roots = [], []
        for a, h, nodes, leaves_ in lexicalized_trees(n, nt, t):
            base = float(f.root[b, h, a]) + sum(float(f.terminal[b, i, k - nt])
                                                 for i, k in leaves_)
            for classes in product(range(r), repeat=len(nodes)):
                logp = base + sum(float(f.head[b, h_, a_, c] + f.head_child[c, side, hs]
                                        + f.dep_child[c, ds] + f.dep_word[b, dh, c])
                                  for (i, j, a_, h_, side, hs, ds, dh), c in zip(nodes, classes))
                scores.append(beta * logp)
                roots.append((h, a))
        scores = torch.tensor(scores, dtype=torch.float64)
        want = float(torch.logsumexp(scores, 0))
        assert math.isclose(float(logz[b].detach()), want, rel_tol=0, abs_tol=1e-9)
        posterior = torch.softmax(scores, 0)
        expected = torch.zeros(max(lengths), nt + t, dtype=torch.float64)
        for (h, a), q in zip(roots, posterior):
            expected[h, a] += q
        (grad,) = torch.autograd.grad(logz[b], [leaves.root], retain_graph=True)
        torch.testing.assert_close(grad[b] / beta, expected, rtol=0, atol=1e-9)


def test_tempering_by_one_is_the_identity_and_beta_must_be_positive():
    factors = random_factors([3], 2, 2, 2, 5)
    assert factors.tempered(1.0) is factors
    for bad in (0.0, -0.5, float("nan")):
        with pytest.raises(ValueError, match="must be positive"):
            factors.tempered(bad)
