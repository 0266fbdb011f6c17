"""The engine against brute-force enumeration of every tree (independent reference: the
definitions of log Z, the best tree and posterior expectations, computed tree by tree)."""

from __future__ import annotations

import math

import pytest
import torch
from scipy.stats import chisquare

from _brute import summary
from _grammars import random_grammar
from treewright import engine
from treewright.inference import encode, tree_logprob, spans_to_tree
from treewright.engine.reference import reference_inside

CASES = [  # (nonterminals, preterminals, sentence length, nonterminals emit words)
    (2, 2, 2, False), (2, 2, 4, False), (2, 2, 5, False), (2, 1, 7, False),
    (2, 2, 3, True), (2, 1, 4, True), (3, 2, 4, False),
]


def _sentence(grammar, n, seed):
    gen = torch.Generator().manual_seed(seed)
    v = len(grammar.vocab)
    return [grammar.vocab.words[int(i)] for i in torch.randint(v, (n,), generator=gen)]


def _inputs(grammar, words):
    enc = encode(grammar, [words], torch.float64)
    return grammar.root, grammar.binary, enc.terminal, enc.lengths, enc.nt_terminal


@pytest.mark.parametrize("nt,t,n,nt_emit", CASES)
def test_log_z_counts_spans_and_viterbi_match_enumeration(nt, t, n, nt_emit):
    grammar = random_grammar(nt, t, 3, seed=10 * n + nt, nt_emit=nt_emit)
    words = _sentence(grammar, n, seed=n)
    brute = summary(grammar, words)
    args = _inputs(grammar, words)

    post = engine.posteriors(*args)
    assert float(post.logz[0]) == pytest.approx(brute["logz"], rel=1e-10)
    assert float(reference_inside(*args)[0]) == pytest.approx(brute["logz"], rel=1e-10)
    torch.testing.assert_close(post.binary, brute["counts"], atol=1e-10, rtol=1e-8)
    torch.testing.assert_close(post.spans[0], brute["spans"], atol=1e-10, rtol=1e-8)
    nt_ = len(grammar.nonterminals)
    torch.testing.assert_close(post.terminal[0], brute["term"][:, nt_:], atol=1e-10, rtol=1e-8)
    if nt_emit:
        torch.testing.assert_close(post.nt_terminal[0], brute["term"][:, :nt_],
                                   atol=1e-10, rtol=1e-8)

    (score, spans), = engine.viterbi(*args)
    best_lp, best_spans, _ = brute["best"]
    assert score == pytest.approx(best_lp, rel=1e-10)
    assert sorted(spans) == sorted(best_spans)
    # Fact of the trade (common practice): a tree's probability is the product of its rules'.
    tree = spans_to_tree(grammar, words, spans)
    assert tree_logprob(grammar, tree) == pytest.approx(score, rel=1e-10)


def test_batched_sentences_of_different_lengths_match_one_at_a_time():
    grammar = random_grammar(3, 2, 4, seed=3)
    sentences = [_sentence(grammar, n, seed=n) for n in (5, 2, 4, 3)]
    enc = encode(grammar, sentences, torch.float64)
    batch = engine.log_partition(grammar.root, grammar.binary, enc.terminal, enc.lengths)
    for k, words in enumerate(sentences):
        assert float(batch[k]) == pytest.approx(summary(grammar, words)["logz"], rel=1e-10)


@pytest.mark.parametrize("nt_emit", [False, True])
def test_viterbi_over_a_batch_matches_enumeration(nt_emit):
    # The max over a word's preterminal is taken once per position and the winning preterminal
    # is found again for the best tree's words; the maxima are max-plus products over every
    # column (`engine.maxplus.max_plus_dense`, checked against the broadcast in
    # tests/test_engine_maxplus.py), sentences of several lengths in one batch. Reference:
    # brute-force enumeration of every tree of each sentence.
    grammar = random_grammar(2, 3, 4, seed=7, nt_emit=nt_emit)
    lengths = (4, 2, 3, 1) if nt_emit else (4, 2, 5, 3)  # one word: a tree only if NTs emit
    sentences = [_sentence(grammar, n, seed=20 + n) for n in lengths]
    enc = encode(grammar, sentences, torch.float64)
    results = engine.viterbi(grammar.root, grammar.binary, enc.terminal, enc.lengths,
                             enc.nt_terminal)
    for words, result in zip(sentences, results):
        best_lp, best_spans, _ = summary(grammar, words)["best"]
        assert_best_tree(result, best_lp, best_spans)


def assert_best_tree(result, best_lp: float, best_spans) -> None:
    """A Viterbi result is the enumerated best tree, or None where no tree scores above -inf."""
    if best_lp == -math.inf:
        assert result is None
        return
    score, spans = result
    assert score == pytest.approx(best_lp, rel=1e-10)
    assert sorted(spans) == sorted(best_spans)


@pytest.mark.parametrize("per_symbol", [False, True])
def test_viterbi_with_span_probabilities_matches_enumeration(per_symbol):
    # `span_prob`: probabilities whose logarithms the pass adds to each nonterminal over each
    # span of two or more words (max-rule-product's label marginals), some of them zero (the
    # span or label is ruled out). Reference: brute-force enumeration of every tree, each scored
    # with those logarithms added; and the same pass given the logarithms as `span_pot`.
    grammar = random_grammar(3, 2, 4, seed=11)
    nt = len(grammar.nonterminals)
    sentences = [_sentence(grammar, n, seed=40 + n) for n in (5, 3, 4)]
    enc = encode(grammar, sentences, torch.float64)
    gen = torch.Generator().manual_seed(5)
    shape = (3, 6, 6, nt + 2) if per_symbol else (3, 6, 6)
    prob = torch.rand(shape, generator=gen, dtype=torch.float64)
    prob = prob.masked_fill(torch.rand(shape, generator=gen) < 0.15, 0.0)
    args = (grammar.root, grammar.binary, enc.terminal, enc.lengths)
    results = engine.viterbi(*args, span_prob=prob)
    assert results == engine.viterbi(*args, span_pot=prob.log())
    for b, (words, result) in enumerate(zip(sentences, results)):
        best, best_spans = -math.inf, None
        for lp, spans, _ in summary(grammar, words)["trees"]:
            for i, j, x in spans:
                if j - i >= 2:
                    p = prob[b, i, j - i, x] if per_symbol else prob[b, i, j - i]
                    lp += math.log(p) if p > 0 else -math.inf
            if lp > best:
                best, best_spans = lp, spans
        assert_best_tree(result, best, best_spans)
    with pytest.raises(ValueError, match="span_pot or span_prob"):
        engine.viterbi(*args, span_pot=prob.log(), span_prob=prob)


def test_viterbi_breaks_exact_ties_as_its_docstring_says():
    # Every rule and word score 0 (log 1): every tree of the sentence scores exactly 0, so the
    # tree is decided by the tie rules alone. Reference: worked by hand from `viterbi`'s
    # docstring (first block: two constituents, a word on the right, on the left, two words;
    # then the first split; then the lowest-numbered children; the first top symbol).
    nt, t, n = 2, 2, 5
    s = nt + t
    root, binary = torch.zeros(nt, dtype=torch.float64), torch.zeros(nt, s, s, dtype=torch.float64)
    terminal = torch.zeros(1, n, t, dtype=torch.float64)
    (score, spans), = engine.viterbi(root, binary, terminal, torch.tensor([n]))
    assert score == 0.0
    # (0, 5): two constituents split at 2 (the first split with both children of 2+ words);
    # (0, 2) and (2, 4): two words; (2, 5): a constituent and a word on the right (three words
    # cannot split into two constituents of 2+ words). Symbols: N0 = 0, P0 = 2.
    assert sorted(spans) == [(0, 1, 2), (0, 2, 0), (0, 5, 0), (1, 2, 2), (2, 3, 2), (2, 4, 0),
                             (2, 5, 0), (3, 4, 2), (4, 5, 2)]


def test_zero_probability_rule_rules_out_every_tree_that_uses_it():
    # Fact of the trade (common practice): a zero-probability rule removes exactly the trees
    # that use it; brute force over the remaining trees gives the new log Z.
    grammar = random_grammar(2, 2, 3, seed=5)
    words = _sentence(grammar, 5, seed=2)
    grammar.binary[0, 2, 3] = -math.inf
    brute = summary(grammar, words)
    assert all(("bin", 0, 2, 3) not in rules for _, _, rules in brute["trees"])
    post = engine.posteriors(*_inputs(grammar, words))
    assert float(post.logz[0]) == pytest.approx(brute["logz"], rel=1e-10)
    assert float(post.binary[0, 2, 3]) == 0.0


def test_partial_brackets_restrict_the_sum_to_compatible_trees():
    # Pereira & Schabes (1992): with a forbidden span, log Z sums only the trees without it.
    grammar = random_grammar(2, 2, 3, seed=8)
    words = _sentence(grammar, 5, seed=4)
    brute = summary(grammar, words)
    kept = [lp for lp, spans, _ in brute["trees"] if (1, 4) not in {(i, j) for i, j, _ in spans}]
    pot = torch.zeros(1, 6, 6, dtype=torch.float64)
    pot[0, 1, 3] = -math.inf
    args = _inputs(grammar, words)
    logz = engine.log_partition(*args[:4], span_pot=pot)
    assert float(logz[0]) == pytest.approx(float(torch.logsumexp(torch.tensor(kept, dtype=torch.float64), 0)),
                                           rel=1e-10)


def test_sampler_tree_frequencies_match_the_exact_posterior():
    # Chi-square goodness of fit of 6,000 draws against the enumerated posterior (fixed seed).
    grammar = random_grammar(2, 1, 2, seed=21)
    words = _sentence(grammar, 4, seed=1)
    brute = summary(grammar, words)
    exact = {tuple(sorted(spans)): math.exp(lp - brute["logz"]) for lp, spans, _ in brute["trees"]}
    draws = 6000
    gen = torch.Generator().manual_seed(0)
    args = _inputs(grammar, words)
    trees = engine.sample_trees(*args[:4], num_samples=draws, generator=gen)[0]
    observed = {key: 0 for key in exact}
    for spans in trees:
        observed[tuple(sorted(spans))] += 1  # a KeyError here would be a tree that cannot exist
    keys = sorted(exact, key=exact.get, reverse=True)
    big = [k for k in keys if exact[k] * draws >= 5]
    small = [k for k in keys if exact[k] * draws < 5]
    obs = [observed[k] for k in big] + ([sum(observed[k] for k in small)] if small else [])
    exp = [exact[k] * draws for k in big] + ([sum(exact[k] for k in small) * draws]
                                             if small else [])
    assert len(big) >= 10
    assert chisquare(obs, exp).pvalue > 0.001


@pytest.mark.parametrize("nt,t,nt_emit", [(3, 2, False), (2, 1, True), (2, 0, True)])
def test_label_marginals_of_a_batch_match_enumeration(nt, t, nt_emit):
    # Brute force: p(symbol over span | sentence) summed over the enumerated trees that have it,
    # for sentences of different lengths in one batch (t = 0: no pure preterminal).
    grammar = random_grammar(nt, t, 3, seed=7 * nt + t, nt_emit=nt_emit)
    sentences = [_sentence(grammar, n, seed=n) for n in (4, 2, 3)]
    enc = encode(grammar, sentences, torch.float64)
    tables = engine.span_tables(grammar.root, grammar.binary, enc.terminal, enc.lengths,
                                enc.nt_terminal)
    # Marginals alone (no log scores) are the same numbers: checked below against brute force.
    bare = engine.span_tables(grammar.root, grammar.binary, enc.terminal, enc.lengths,
                              enc.nt_terminal, log_scores=False)
    assert bare.inside is None and bare.outside is None
    for b, words in enumerate(sentences):
        brute = summary(grammar, words)
        n = len(words)
        expect = torch.zeros(n + 1, n + 1, grammar.num_symbols, dtype=torch.float64)
        for lp, spans, _ in brute["trees"]:
            for i, j, a in spans:
                expect[i, j - i, a] += math.exp(lp - brute["logz"])
        assert float(tables.logz[b]) == pytest.approx(brute["logz"], rel=1e-10)
        for marginals in (tables.marginals, bare.marginals):
            torch.testing.assert_close(marginals[b, :n + 1, :n + 1], expect,
                                       atol=1e-10, rtol=1e-8)
        assert float(bare.logz[b]) == pytest.approx(brute["logz"], rel=1e-10)
        torch.testing.assert_close(tables.marginals[b, n + 1:], torch.zeros_like(
            tables.marginals[b, n + 1:]))
        # inside + outside (over Z) is the log marginal wherever a symbol can be (the
        # definition of the outside score); spans summed over labels are the span posteriors.
        both = tables.inside[b, :n + 1, :n + 1, :nt] + tables.outside[b, :n + 1, :n + 1]
        torch.testing.assert_close(both.exp(), expect[..., :nt], atol=1e-10, rtol=1e-8)
        spans = tables.marginals[b, :, :, :nt].sum(-1)
        spans[:, 1] = 0.0
        torch.testing.assert_close(spans[:n + 1, :n + 1], brute["spans"], atol=1e-10, rtol=1e-8)
