"""Decoders against brute force: every binary bracketing, every labeling, every tree.

References: exhaustive enumeration of the trees of small seeded grammars (brute force) gives
p(tree, sentence) for every tree; labeled span marginals, anchored coarse-rule posteriors, the
MBR objective and the max-rule-product objective (Petrov & Klein 2007, section 3) are computed
from that list directly, with no inside or outside pass.
"""

from __future__ import annotations

import itertools
import math
from collections import defaultdict
from functools import lru_cache

import pytest
import torch

from treewright import decode as decode_module
from treewright import inference
from treewright.engine import maxplus
from treewright.decode import (TreeScorer, coarse_name, consensus, decode, max_rule_product,
                               mbr_decode, mbr_spans, span_tables, tree_logprob_summed)
from _grammars import random_grammar
from treewright.errors import InputError
from treewright.grammar import Grammar
from treewright.trees import Tree, tree_from_spans
from treewright.vocab import Vocabulary


def make_grammar(nonterminals, preterminals, num_words, seed, nt_emit=False) -> Grammar:
    """A normalized random grammar over words w0.. (seeded), with the given symbol names."""
    return random_grammar(len(nonterminals), len(preterminals), num_words, seed,
                          nt_emit=nt_emit, names=(nonterminals, preterminals))


@lru_cache(maxsize=None)
def bracketings(i: int, j: int) -> tuple:
    """Every binary bracketing of words i..j as a tuple of spans (i, k, j) of internal nodes."""
    if j - i == 1:
        return ((),)
    out = []
    for k in range(i + 1, j):
        for left in bracketings(i, k):
            for right in bracketings(k, j):
                out.append(((i, k, j),) + left + right)
    return tuple(out)


def all_trees(g: Grammar, words, keep=None):
    """(probability, binary nodes [(i, k, j, A, B, C)], word labels, top) of every fine tree
    (whose bracketing `keep` accepts, when given)."""
    symbols = g.symbols
    nt = len(g.nonterminals)
    ids = g.vocab.encode(words)
    n = len(words)
    emitters = [x for x in range(len(symbols)) if bool(torch.isfinite(g.lexical[x]).any())]
    leaf_choices = [x for x in emitters if x < nt] if n == 1 else emitters
    for brackets in bracketings(0, n):
        if keep is not None and not keep(brackets):
            continue
        for internal in itertools.product(range(nt), repeat=len(brackets)):
            for leaves in itertools.product(leaf_choices, repeat=n):
                label = {(i, i + 1): leaves[i] for i in range(n)}
                label.update({(i, j): a for (i, _, j), a in zip(brackets, internal)})
                logp = float(g.root[label[(0, n)]])
                nodes = []
                for (i, k, j) in brackets:
                    a, b, c = label[(i, j)], label[(i, k)], label[(k, j)]
                    logp += float(g.binary[a, b, c])
                    nodes.append((i, k, j, a, b, c))
                logp += sum(float(g.lexical[leaves[i], ids[i]]) for i in range(n))
                if logp > -math.inf:
                    yield math.exp(logp), nodes, leaves, label[(0, n)]


REFINED = make_grammar(["S·0", "S·1", "X·0"], ["P·0", "P·1", "Q·0"], 3, seed=7)
# Coarse S with a preterminal subcategory beside its two nonterminal ones: it parents no rule.
MIXED = make_grammar(["S·0", "S·1", "X·0"], ["S·2", "P·0", "P·1"], 3, seed=7)
SENTENCES = [["w0", "w1"], ["w2", "w0", "w1"], ["w1", "w2", "w0", "w1"]]


def test_mbr_spans_matches_every_bracketing():
    # Brute force: the best sum over all binary bracketings of n <= 7 words, on random scores.
    gen = torch.Generator().manual_seed(3)
    for n in range(2, 8):
        scores = torch.rand(n + 1, n + 1, generator=gen, dtype=torch.float64)
        best = max(sum(float(scores[i, j - i]) for i, _, j in b) for b in bracketings(0, n))
        spans = mbr_spans(scores, n)
        assert len(spans) == n - 1  # a binary tree of n words has n-1 wider spans (fact of trade)
        assert sum(float(scores[i, j - i]) for i, j in spans) == pytest.approx(best, abs=1e-12)
        assert (0, n) in spans


def test_label_marginals_match_enumeration():
    # Brute force: p(symbol over span | sentence) summed over the trees that contain it.
    g = make_grammar(["A", "B"], ["P", "R"], 3, seed=1, nt_emit=True)
    words = ["w2", "w0", "w1", "w0"]
    tables = span_tables(g, [words])
    expect = defaultdict(float)
    total = 0.0
    for p, nodes, leaves, _ in all_trees(g, words):
        total += p
        for i, _, j, a, _, _ in nodes:
            expect[(i, j, a)] += p
        for i, x in enumerate(leaves):
            expect[(i, i + 1, x)] += p
    assert float(tables.logz[0]) == pytest.approx(math.log(total), abs=1e-10)
    marg = tables.marginals[0]
    n = len(words)
    for i in range(n):
        for j in range(i + 1, n + 1):
            for x in range(g.num_symbols):
                assert float(marg[i, j - i, x]) == pytest.approx(expect[(i, j, x)] / total,
                                                                abs=1e-10)


def test_mbr_tree_maximizes_expected_correct_spans():
    # Brute force: span marginals from the tree list; the best bracketing's summed marginals.
    g = make_grammar(["A", "B", "C"], ["P", "R"], 3, seed=5)
    for words in SENTENCES:
        n = len(words)
        span_p = defaultdict(float)
        total = 0.0
        for p, nodes, _, _ in all_trees(g, words):
            total += p
            for i, _, j, *_ in nodes:
                span_p[(i, j)] += p
        best = max(sum(span_p[(i, j)] / total for i, _, j in b) for b in bracketings(0, n))
        result = decode(g, [words], "mbr")[0]
        assert result.score == pytest.approx(best, abs=1e-10)
        tree_spans = {(i, j) for i, j, _ in result.tree.labeled_spans() if j - i >= 2}
        assert sum(span_p[s] for s in tree_spans) / total == pytest.approx(best, abs=1e-10)
        assert result.tree.leaves() == words
        # The tree's probability is the grammar's own (inference.tree_logprob, another route).
        assert result.tree_logprob == pytest.approx(inference.tree_logprob(g, result.tree))
    assert [t.to_string() for t in mbr_decode(g, SENTENCES)] == \
        [d.tree.to_string() for d in decode(g, SENTENCES, "mbr")]


def test_viterbi_decoder_is_the_most_probable_tree():
    # Brute force: the maximum of p(tree, sentence) over the tree list.
    g = make_grammar(["A", "B"], ["P", "R"], 3, seed=2)
    for words in SENTENCES:
        best = max(p for p, *_ in all_trees(g, words))
        total = sum(p for p, *_ in all_trees(g, words))
        result = decode(g, [words], "viterbi")[0]
        assert result.tree_logprob == pytest.approx(math.log(best), abs=1e-10)
        assert result.posterior == pytest.approx(best / total, abs=1e-10)


def coarse_trees(g, words, spans=None, keep=None):
    """Brute force max-rule-product scores: anchored coarse-rule posteriors from the tree list,
    then (log score, labeled spans sorted) of every coarse tree, over every bracketing and
    coarse labeling (over the bracketing whose spans (i, j) of two or more words are `spans`,
    when given; over the trees and bracketings `keep` accepts, when given); a tree with a zero
    factor scores -inf."""
    symbols = g.symbols
    nt = len(g.nonterminals)
    cname = [coarse_name(s) for s in symbols]
    n = len(words)
    rule_q = defaultdict(float)   # (i, k, j, a, b, c) coarse
    word_q = defaultdict(float)   # (i, x) coarse
    top_q = defaultdict(float)
    total = 0.0
    for p, nodes, leaves, top in all_trees(g, words, keep):
        total += p
        for i, k, j, a, b, c in nodes:
            rule_q[(i, k, j, cname[a], cname[b], cname[c])] += p
        for i, x in enumerate(leaves):
            word_q[(i, cname[x])] += p
        top_q[cname[top]] += p
    parents = sorted({cname[a] for a in range(nt)})
    everyone = sorted(set(cname))
    for brackets in bracketings(0, n):
        if spans is not None and sorted((i, j) for i, _, j in brackets) != sorted(spans):
            continue
        if keep is not None and not keep(brackets):
            continue
        for internal in itertools.product(parents, repeat=len(brackets)):
            for leaves in itertools.product(everyone, repeat=n):
                label = {(i, i + 1): leaves[i] for i in range(n)}
                label.update({(i, j): a for (i, _, j), a in zip(brackets, internal)})
                q = top_q[label[(0, n)]] / total
                for i, k, j in brackets:
                    q *= rule_q[(i, k, j, label[(i, j)], label[(i, k)], label[(k, j)])] / total
                for i in range(n):
                    q *= word_q[(i, leaves[i])] / total
                yield (math.log(q) if q > 0 else -math.inf,
                       sorted((i, j, a) for (i, j), a in label.items()))


def coarse_objective(g, words, spans=None, keep=None):
    """Brute force max-rule-product: the best coarse tree's log score and labeled spans (the
    first of equal ones, in `coarse_trees` order)."""
    best, best_tree = -math.inf, None
    for value, labeled in coarse_trees(g, words, spans, keep):
        if value > best:
            best, best_tree = value, labeled
    return best, best_tree


def test_max_rule_product_matches_enumeration():
    for words in SENTENCES:
        expect_value, expect_spans = coarse_objective(REFINED, words)
        tables = span_tables(REFINED, [words])
        (spans, value), = max_rule_product(REFINED, tables, [len(words)])
        assert value == pytest.approx(expect_value, abs=1e-9)
        assert sorted(spans) == expect_spans
        result = decode(REFINED, [words], "max-rule-product")[0]
        assert all("·" not in label for _, _, label in result.tree.labeled_spans())


# A refined grammar with a third of its binary rules removed: sharper posteriors, so that the
# floors below leave labeled spans out.
SPARSE = random_grammar(3, 3, 3, seed=11, sparsity=0.35,
                        names=(["S·0", "S·1", "X·0"], ["P·0", "P·1", "Q·0"]))


# The two exact passes of max-rule-product with a floor: over the whole chart (the kept
# (span, coarse parent) pairs) and over the kept labeled spans alone (items).
FLOORED_PASSES = ["_max_rule_product_refined", "_max_rule_product_items"]


@pytest.mark.parametrize("grammar", [REFINED, SPARSE], ids=["dense", "sparse"])
@pytest.mark.parametrize("floored", FLOORED_PASSES)
def test_max_rule_product_floor_at_the_best_score_keeps_the_best_tree(grammar, floored):
    # Brute force (coarse_objective): every factor of the objective is a posterior, at most the
    # marginal of each labeled span it touches, so a floor equal to the best score leaves out
    # only spans of worse trees, and the pass still finds the enumerated best. A floor above it
    # finds no tree that reaches the floor (the wrapper then decodes again).
    # The same with the tree bound (`_tree_bound`) in place of the marginals.
    run = getattr(decode_module, floored)
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    for words in SENTENCES:
        expect_value, expect_spans = coarse_objective(grammar, words)
        tables = span_tables(grammar, [words])
        coarse_log = (tables.marginals @ layout.member).log()
        at = torch.tensor([expect_value], dtype=torch.float64)
        for bound in (None, decode_module._tree_bound(coarse_log, torch.tensor([len(words)]),
                                                      layout.num_parents)):
            [(spans, value)], found = run(grammar, tables, [len(words)], layout, at,
                                          coarse_log=coarse_log, bound=bound)
            assert value == pytest.approx(expect_value, abs=1e-9)
            assert sorted(spans) == expect_spans and float(found[0]) == value
            _, above = run(grammar, tables, [len(words)], layout, at + 0.5,
                           coarse_log=coarse_log, bound=bound)
            assert not float(above[0]) >= float(at[0]) + 0.5


def hand_worked_grammar() -> Grammar:
    """"w0 w0" is S·0 (root 0.6) or X·0 (root 0.4) over P·0 P·0, every other choice forced."""
    neg = -math.inf
    binary = torch.full((2, 4, 4), neg, dtype=torch.float64)
    binary[0, 2, 2] = binary[1, 2, 2] = 0.0
    lexical = torch.full((4, 2), neg, dtype=torch.float64)
    lexical[2, 0] = lexical[3, 1] = 0.0
    return Grammar(["S·0", "X·0"], ["P·0", "P·1"], Vocabulary(["w0", "w1"], unk=None),
                   torch.tensor([0.6, 0.4], dtype=torch.float64).log(), binary, lexical,
                   start="TOP")


@pytest.mark.parametrize("floored", FLOORED_PASSES)
def test_max_rule_product_floor_keeps_a_labeled_span_just_above_it(floored):
    # Hand-worked: "w0 w0" is S·0 (root 0.6) or X·0 (root 0.4) over P·0 P·0, every other choice
    # forced. The best tree, S over two Ps, scores 0.6 (top label) x 0.6 (its rule's posterior)
    # = 0.36, while S over the sentence has marginal 0.6: with the floor at log 0.36 that span
    # is kept, though only 0.51 nats above it. A floor stricter than the bound by that much
    # would lose the tree; so would one stricter than the tree bound, which here is the best
    # score itself (test_tree_bound_on_a_hand_worked_grammar).
    g = hand_worked_grammar()
    tables = span_tables(g, [["w0", "w0"]])
    layout = decode_module.CoarseLayout.of(g, torch.float64)
    coarse_log = (tables.marginals @ layout.member).log()
    at = torch.tensor([math.log(0.36)], dtype=torch.float64)
    for bound in (None, decode_module._tree_bound(coarse_log, torch.tensor([2]),
                                                           layout.num_parents)):
        [(spans, value)], _ = getattr(decode_module, floored)(g, tables, [2], layout, at,
                                                              coarse_log=coarse_log, bound=bound)
        assert value == pytest.approx(math.log(0.36), abs=1e-12)
        assert sorted(spans) == [(0, 1, "P"), (0, 2, "S"), (1, 2, "P")]


@pytest.mark.parametrize("grammar", [REFINED, SPARSE], ids=["dense", "sparse"])
def test_tree_bound_is_above_every_tree_that_holds_the_labeled_span(grammar):
    # Brute force (coarse_trees): for every labeled span, the bound is at least the score of
    # every coarse tree holding it (the argument of `_tree_bound`), and it is sharper than the
    # span's marginal alone somewhere (what the bound is for).
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    index = {name: k for k, name in enumerate(layout.names)}
    tables = span_tables(grammar, SENTENCES)
    lengths = torch.tensor([len(w) for w in SENTENCES])
    coarse_log = (tables.marginals @ layout.member).log()
    bound = decode_module._tree_bound(coarse_log, lengths, layout.num_parents)
    sharper = 0
    for b, words in enumerate(SENTENCES):
        held = defaultdict(lambda: -math.inf)       # (i, j, label) -> best score holding it
        for value, labeled in coarse_trees(grammar, words):
            for span in labeled:
                held[span] = max(held[span], value)
        for (i, j, label), value in held.items():
            at = bound[b, i, j - i, index[label]]
            assert float(at) >= value - 1e-12
            sharper += float(at) < float(coarse_log[b, i, j - i, index[label]]) - 0.05
    assert sharper > 0


def test_tree_bound_on_a_hand_worked_grammar():
    # Hand-worked (hand_worked_grammar): both words are P with posterior 1, S over the sentence
    # has marginal 0.6 and X 0.4. S's bound is 0.6 (its rule's posterior, at most the least of
    # S's 0.6 and the two Ps' 1) x 0.6 (the top label's) = 0.36, exactly the best tree's
    # score; X's 0.4 x 0.4 = 0.16, exactly its only tree's (a bound that charged the rule the
    # top span's best label, 0.6, gave 0.24); each word's P 1 (its label) x 0.6 (the rule
    # above it, at most the top span's best label) x 0.6 (the top label) = 0.36.
    g = hand_worked_grammar()
    layout = decode_module.CoarseLayout.of(g, torch.float64)
    tables = span_tables(g, [["w0", "w0"]])
    coarse_log = (tables.marginals @ layout.member).log()
    bound = decode_module._tree_bound(coarse_log, torch.tensor([2]), layout.num_parents)
    slack = decode_module.FLOOR_SLACK
    k = {name: i for i, name in enumerate(layout.names)}
    assert float(bound[0, 0, 2, k["S"]]) == pytest.approx(math.log(0.36) + slack, abs=1e-12)
    assert float(bound[0, 0, 2, k["X"]]) == pytest.approx(math.log(0.16) + slack, abs=1e-12)
    for i in (0, 1):
        assert float(bound[0, i, 1, k["P"]]) == pytest.approx(math.log(0.36) + slack,
                                                              abs=1e-12)


@pytest.mark.parametrize("grammar", [REFINED, SPARSE], ids=["dense", "sparse"])
def test_tree_bound_is_its_definition_over_every_bracketing(grammar):
    # Brute force over every binary bracketing (bracketings) of the bound's definition, not of
    # its dynamic program: for a labeled span x over (i, j), the best over the bracketings that
    # hold (i, j) of the product of each binary node's least span bound (x's own mu at (i, j),
    # the best label's mu u elsewhere), every word's best label posterior (x's mu at a word
    # x labels) and the top label's bound (x's mu when (i, j) is the sentence).
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    sentences = SENTENCES + [["w0", "w2", "w1", "w0", "w2"]]
    tables = span_tables(grammar, sentences)
    lengths = torch.tensor([len(w) for w in sentences])
    coarse_log = (tables.marginals @ layout.member).log()
    bound = decode_module._tree_bound(coarse_log, lengths, layout.num_parents)
    kp, slack = layout.num_parents, decode_module.FLOOR_SLACK
    for b, words in enumerate(sentences):
        n = len(words)
        log = coarse_log[b].tolist()
        u = {(i, j): max(log[i][j - i][:kp] if j - i > 1 else log[i][1])
             for i in range(n) for j in range(i + 1, n + 1)}
        for i in range(n):
            for j in range(i + 1, n + 1):
                for x in range(kp if j - i > 1 else len(layout.names)):
                    mu = log[i][j - i][x]
                    if mu == -math.inf:
                        assert float(bound[b, i, j - i, x]) == -math.inf
                        continue
                    at = dict(u)
                    at[i, j] = mu
                    best = -math.inf
                    for nodes in bracketings(0, n):
                        if j - i > 1 and not any(a == i and c == j for a, _, c in nodes):
                            continue
                        value = at[0, n] + sum(at[k, k + 1] for k in range(n))
                        value += sum(min(at[a, c], at[a, m], at[m, c]) for a, m, c in nodes)
                        best = max(best, value)
                    assert float(bound[b, i, j - i, x]) == pytest.approx(best + slack,
                                                                         abs=1e-12)


@pytest.mark.parametrize("grammar", [REFINED, SPARSE], ids=["dense", "sparse"])
def test_known_tree_floor_is_the_best_labeling_of_the_mbr_bracketing(monkeypatch, grammar):
    # Brute force (coarse_objective restricted to one bracketing): with every label tried, the
    # known tree's floor is the best max-rule-product score over labelings of the MBR
    # bracketing (less the slack), so never above the best of all trees; with one label per
    # span, the score of the MBR tree under its most probable labels, no higher.
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    tables = span_tables(grammar, SENTENCES)
    lengths = [len(w) for w in SENTENCES]
    coarse_log = (tables.marginals @ layout.member).log()
    floor = torch.full((len(SENTENCES),), -1e6, dtype=torch.float64)
    brackets = decode_module.mbr_spans_batch(
        decode_module._span_posteriors(tables.marginals, len(grammar.nonterminals)),
        lengths)
    monkeypatch.setattr(decode_module, "KNOWN_TREE_LABELS", len(layout.names))
    every = decode_module._known_tree_floor(grammar, tables, lengths, layout, floor, coarse_log)
    monkeypatch.setattr(decode_module, "KNOWN_TREE_LABELS", 1)
    one = decode_module._known_tree_floor(grammar, tables, lengths, layout, floor, coarse_log)
    for b, words in enumerate(SENTENCES):
        best, _ = coarse_objective(grammar, words)
        on_mbr, _ = coarse_objective(grammar, words, brackets[b])
        slack = decode_module.FLOOR_SLACK
        assert float(every[b]) + slack == pytest.approx(on_mbr, abs=1e-9)
        assert on_mbr <= best + 1e-12
        assert float(one[b]) <= float(every[b]) + 1e-12 and math.isfinite(float(one[b]))


# REFINED and MIXED, with each coarse symbol's (subcategories, nonterminal subcategories) read
# off the names by hand.
SUBCATEGORY_CASES = [
    (REFINED, {"S": (2, 2), "X": (1, 1), "P": (2, 0), "Q": (1, 0)}),
    (MIXED, {"S": (3, 2), "X": (1, 1), "P": (2, 0)}),
]


@pytest.mark.parametrize("grammar, subs", SUBCATEGORY_CASES, ids=["refined", "mixed"])
def test_item_pass_work_counts_every_anchored_rule_enumerated(grammar, subs):
    # Reference: the anchored rules among random kept labeled spans listed one by one, each
    # with the subcategory triples its sum reads (a rule's parent reads its nonterminal
    # subcategories, each child all of its own).
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    all_subs = [subs[name][0] for name in layout.names]
    nt_subs = [subs[name][1] for name in layout.names]
    B, N, K = 3, 6, len(layout.names)
    lengths = torch.tensor([6, 4, 5])
    gen = torch.Generator().manual_seed(4)
    start, width = torch.arange(N + 1)[:, None], torch.arange(N + 1)[None, :]
    inside = (width >= 1) & (start + width <= lengths[:, None, None])
    kept = (torch.rand((B, N + 1, N + 1, K), generator=gen) < 0.6) & inside[..., None]
    kept &= (width[..., None] == 1) | (torch.arange(K) < layout.num_parents)
    rules, entries, _ = decode_module._pass_costs(kept, layout, lengths)
    for b in range(B):
        want_rules = want_entries = 0
        for i, w in itertools.product(range(N + 1), range(2, N + 1)):
            for x, u in itertools.product(range(layout.num_parents), range(1, w)):
                if i + w > N or not kept[b, i, w, x]:
                    continue
                for y, z in itertools.product(range(K), range(K)):
                    if kept[b, i, u, y] and kept[b, i + u, w - u, z]:
                        want_rules += 1
                        want_entries += nt_subs[x] * all_subs[y] * all_subs[z]
        assert (int(rules[b]), int(entries[b])) == (want_rules, want_entries)
    G = layout.slots.shape[1]
    assert int(entries.sum()) < int(rules.sum()) * G ** 3     # fewer than G**3 a rule


def test_unrefined_chart_cost_counts_the_viterbi_pass_enumerated():
    # Reference: the max-semiring pass's work counted span by span and split by split, as
    # engine.viterbi does it: per span of two or more words NT**3 rule maxima over the child
    # pairs, per split NT**2 pair sums; per word the two blocks with a word child, NT * S * T
    # each. An unrefined grammar's chart pass takes no floor, so its cost is the whole chart's.
    nt, t = 4, 5
    grammar = random_grammar(nt, t, 3, seed=3)
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    assert layout.slots.shape[1] == 1
    lengths = torch.tensor([1, 2, 5, 9])
    want = []
    for n in lengths.tolist():
        count = 2 * nt * (nt + t) * t * n
        for i, j in itertools.combinations(range(n + 1), 2):
            if j - i >= 2:
                count += nt ** 3 + (j - i - 1) * nt ** 2
        want.append(decode_module.VITERBI_UNIT * count)
    got = decode_module._viterbi_cost(lengths, layout)
    assert got.tolist() == [round(x) for x in want]
    start, width = torch.arange(10)[:, None], torch.arange(10)[None, :]
    kept = ((width >= 1) & (start + width <= lengths[:, None, None]))[..., None].expand(
        -1, -1, -1, nt + t)                                  # every labeled span kept
    assert torch.equal(decode_module._pass_costs(kept, layout, lengths)[2], got)


# ITEM_OVERHEAD values that force each floored pass wherever a floor is set (the chart pass
# leaves to the item pass only a batch with no anchored rule at all).
PATHS = {"items": -10 ** 9, "chart": 10 ** 12}


def spy_on_passes(monkeypatch) -> list[tuple[str, torch.Tensor]]:
    """Record (pass, floor) for every call of the two floored passes and of the known tree's
    floor, the last as "_known_tree_floor(rows)" when sought for given sentences (those the
    first floor left without a tree, or those of diffuse posteriors)."""
    calls = []
    for name in FLOORED_PASSES + ["_known_tree_floor"]:
        def spy(*args, real=getattr(decode_module, name), name=name, **kwargs):
            calls.append((name + ("(rows)" if kwargs.get("rows") is not None else ""), args[4]))
            return real(*args, **kwargs)
        monkeypatch.setattr(decode_module, name, spy)
    return calls


def assert_max_rule_product_enumerated(grammar, sentences) -> None:
    """max_rule_product on one batch of `sentences` gives the trees and scores of brute force
    (`coarse_objective`)."""
    tables = span_tables(grammar, sentences)
    results = max_rule_product(grammar, tables, [len(w) for w in sentences])
    for words, (spans, value) in zip(sentences, results, strict=True):
        expect_value, expect_spans = coarse_objective(grammar, words)
        assert value == pytest.approx(expect_value, abs=1e-9)
        assert sorted(spans) == expect_spans


def check_paths(calls, path: str, known_tree: bool, nothing_kept: bool = False) -> None:
    """The forced pass ran with a finite floor (the other did not: the known tree's floor is
    an item pass of its own), and the known tree's floor was sought for the whole batch only
    when asked for (and, on the item path, was). With nothing kept no sentence has an
    anchored rule, and the item pass, which then costs nothing, takes them whatever
    ITEM_OVERHEAD is; the first floor then leaves every sentence without a tree, and a known
    tree's floor is sought for them, which the second pass takes rather than no floor."""
    known = [floor for name, floor in calls if name == "_known_tree_floor"]
    floored = {name for name, floor in calls if torch.isfinite(floor).any()
               and name != "_known_tree_floor"}
    if path == "items":
        assert "_max_rule_product_refined" not in floored
        assert "_max_rule_product_items" in floored
    elif not nothing_kept:
        assert "_max_rule_product_refined" in floored
    assert bool(known) <= known_tree
    if known_tree and path == "items":
        assert known
    if nothing_kept:
        assert "_known_tree_floor(rows)" in [name for name, _ in calls]


@pytest.mark.parametrize("known_tree", [False, True], ids=["per-word", "known-tree"])
@pytest.mark.parametrize("path", PATHS)
def test_max_rule_product_with_a_preterminal_subcategory_matches_enumeration(
        monkeypatch, path, known_tree):
    # Brute force (coarse_objective) on MIXED, whose coarse S is a parent and a word's label:
    # the passes must sum a parent's nonterminal subcategories only, each child's all.
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", 1.0)
    monkeypatch.setattr(decode_module, "ITEM_OVERHEAD", PATHS[path])
    monkeypatch.setattr(decode_module, "KNOWN_TREE_FROM", -1 if known_tree else 10 ** 18)
    calls = spy_on_passes(monkeypatch)
    assert_max_rule_product_enumerated(MIXED, SENTENCES)
    passes = {"items": "_max_rule_product_items", "chart": "_max_rule_product_refined"}
    assert passes[path] in [name for name, _ in calls]


@pytest.mark.parametrize("known_tree", [False, True], ids=["per-word", "known-tree"])
@pytest.mark.parametrize("path", PATHS)
@pytest.mark.parametrize("nats_per_word, at_most, passes", [
    (0.01, 1.0, 2),   # a floor above every best tree: each sentence decoded again
    (1.5, 1.0, None),  # the shipped floor, forced on
    (50.0, 1.0, 1),   # a floor that leaves nothing out (a known tree's floor: above it)
    (1.5, 0.0, 1),    # no floor per word (the guard for diffuse posteriors): a known tree's
])
def test_pruned_max_rule_product_matches_enumeration(monkeypatch, path, known_tree,
                                                     nats_per_word, at_most, passes):
    # Brute force (coarse_objective) for every path of the exact pruning, on one batch, with
    # each of the two floored passes, and with the floor raised to a known tree's score or not.
    monkeypatch.setattr(decode_module, "PRUNE_NATS_PER_WORD", nats_per_word)
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", at_most)
    monkeypatch.setattr(decode_module, "ITEM_OVERHEAD", PATHS[path])
    monkeypatch.setattr(decode_module, "KNOWN_TREE_FROM", -1 if known_tree else 10 ** 18)
    real = decode_module._max_rule_product_floored
    floors = []

    def spy(*args):
        floors.append(args[4])
        return real(*args)

    monkeypatch.setattr(decode_module, "_max_rule_product_floored", spy)
    calls = spy_on_passes(monkeypatch)
    for grammar in (REFINED, SPARSE):
        floors.clear()
        calls.clear()
        assert_max_rule_product_enumerated(grammar, SENTENCES)
        if passes is not None:
            assert len(floors) == passes
        if at_most == 0.0:
            # Every sentence counts as diffuse: its floor is a known tree's score (finite:
            # every sentence here has a parse), sought first, and the forced pass runs once.
            assert torch.isfinite(floors[0]).all()
            names = [name for name, _ in calls]
            assert names[0] == "_known_tree_floor(rows)"
            assert names[-1] == {"items": "_max_rule_product_items",
                                 "chart": "_max_rule_product_refined"}[path]
            assert names.count("_max_rule_product_refined") == (path == "chart")
        else:
            check_paths(calls, path, known_tree, nothing_kept=nats_per_word == 0.01)


def longer_sentences():
    """A refined random grammar with sparse rules, and the span tables of 8 sentences of 1 to 12
    words, too long to enumerate: one of them has no parse (no preterminal emits w4), and the
    single word has none either (this grammar's words are all preterminals')."""
    g = random_grammar(6, 6, 5, seed=3, sparsity=0.5,
                       names=([f"S{i // 2}·{i % 2}" for i in range(6)],
                              [f"P{i // 2}·{i % 2}" for i in range(6)]))
    g.lexical[6:, 4] = -math.inf
    gen = torch.Generator().manual_seed(1)
    sentences = [[f"w{int(k)}" for k in torch.randint(0, 4, (n,), generator=gen)]
                 for n in (12, 9, 1, 7, 11, 3, 10, 8)]
    sentences[4][5] = "w4"
    return g, span_tables(g, sentences), [len(w) for w in sentences]


@pytest.mark.parametrize("known_tree", [False, True], ids=["per-word", "known-tree"])
@pytest.mark.parametrize("path", PATHS)
@pytest.mark.parametrize("nats_per_word", [2.0, 5.0])
def test_pruned_max_rule_product_equals_the_full_pass_on_longer_sentences(monkeypatch, path,
                                                                          known_tree,
                                                                          nats_per_word):
    # Reference: the pass without pruning (checked against enumeration above), on sentences too
    # long to enumerate, one of them with no parse and one of a single word: the same trees
    # and the same scores (the item pass sums in another order: equal to rounding). The floor
    # is forced on; at 2 nats per word most sentences' best trees fall below it (decoded again
    # with their found score as the floor), at 5 none do.
    monkeypatch.setattr(decode_module, "PRUNE_NATS_PER_WORD", nats_per_word)
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", 1.0)
    monkeypatch.setattr(decode_module, "ITEM_OVERHEAD", PATHS[path])
    monkeypatch.setattr(decode_module, "KNOWN_TREE_FROM", -1 if known_tree else 10 ** 18)
    real_items, real_kept = decode_module._work_items, decode_module._kept_labels
    left_out = []

    def spy_items(parent_log_mu, floor):
        items = real_items(parent_log_mu, floor)
        if floor is not None:
            left_out.append(parent_log_mu.numel() - sum(len(rows) * (parent_log_mu.shape[-1]
                            if parents is None else 1) for rows, parents in items))
        return items

    def spy_kept(coarse_log, lengths, num_parents, floor):
        kept = real_kept(coarse_log, lengths, num_parents, floor)
        if path == "items":
            every = real_kept(coarse_log.clamp(min=-1e300), lengths, num_parents,
                              torch.full_like(floor, -math.inf))      # every label, -inf too
            left_out.append(int(every.sum() - kept.sum()))
        return kept

    monkeypatch.setattr(decode_module, "_work_items", spy_items)
    monkeypatch.setattr(decode_module, "_kept_labels", spy_kept)
    calls = spy_on_passes(monkeypatch)
    g, tables, lengths = longer_sentences()
    pruned = max_rule_product(g, tables, lengths)
    assert sum(left_out) > 0          # the floor left labeled spans out
    check_paths(calls, path, known_tree)
    full = max_rule_product(g, tables, lengths, prune=False)
    assert pruned[4] is None and [a is None for a in pruned] == [b is None for b in full]
    assert sum(a is not None for a in pruned) == 6     # the 1-word sentence has no parse either
    for a, b in zip(pruned, full):
        if a is not None:
            assert sorted(a[0]) == sorted(b[0]) and a[1] == pytest.approx(b[1], abs=1e-12)


@pytest.mark.parametrize("nats_per_word, at_most", [(2.0, 1.0), (5.0, 1.0), (1.5, 0.0)])
def test_over_the_cap_longer_sentences_equal_the_full_pass(monkeypatch, nats_per_word, at_most):
    # Reference: the pass without pruning (checked against enumeration above), made while the
    # chart layout is allowed; then, with no chart layout allowed, the pruned decoder on the
    # same sentences (one with no parse, one of a single word) under a floor that most best
    # trees fall below, one that none do, and every sentence taken as diffuse.
    g, tables, lengths = longer_sentences()
    full = max_rule_product(g, tables, lengths, prune=False)
    monkeypatch.setattr(decode_module, "MRP_LAYOUT_AT_MOST", 0)
    monkeypatch.setattr(decode_module, "PRUNE_NATS_PER_WORD", nats_per_word)
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", at_most)
    calls = spy_on_passes(monkeypatch)
    pruned = max_rule_product(g, tables, lengths)
    assert "_max_rule_product_refined" not in [name for name, _ in calls]
    assert [a is None for a in pruned] == [b is None for b in full]
    assert sum(a is not None for a in pruned) == 6
    for a, b in zip(pruned, full):
        if a is not None:
            assert sorted(a[0]) == sorted(b[0]) and a[1] == pytest.approx(b[1], abs=1e-12)


@pytest.mark.parametrize("rows_per_call", [1, 3, 16])
def test_refined_chart_pass_in_calls_of_a_few_sentences_each_cut_to_its_longest(
        monkeypatch, rows_per_call):
    # Reference: the whole batch in one unpruned chart pass (checked against enumeration
    # above). With no floor (the guard for diffuse posteriors) the floored pass sorts the
    # sentences of two or more words by length and runs the chart pass on a few at a time,
    # each call's tables cut to its longest sentence: the same trees and scores, and the cut
    # really happens.
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", 0.0)
    monkeypatch.setattr(decode_module, "REFINED_CHART_ROWS", rows_per_call)
    real = decode_module._max_rule_product_refined
    widths = []

    def spy(grammar, tables, lengths, *args, **kwargs):
        widths.append((max(lengths), tables.marginals.shape[1]))
        return real(grammar, tables, lengths, *args, **kwargs)

    g = random_grammar(6, 6, 4, seed=5, names=([f"S{i // 2}·{i % 2}" for i in range(6)],
                                               [f"P{i // 2}·{i % 2}" for i in range(6)]))
    gen = torch.Generator().manual_seed(2)
    sentences = [[f"w{int(k)}" for k in torch.randint(0, 4, (n,), generator=gen)]
                 for n in (9, 2, 6, 1, 8, 4, 7, 3)]
    tables = span_tables(g, sentences)
    lengths = [len(w) for w in sentences]
    full = max_rule_product(g, tables, lengths, prune=False)
    monkeypatch.setattr(decode_module, "_max_rule_product_refined", spy)
    cut = max_rule_product(g, tables, lengths)
    # A one-word sentence has no span to leave out, so it keeps a floor and the item pass.
    assert len(widths) == -(-sum(n >= 2 for n in lengths) // rows_per_call)
    assert all(cells == longest + 1 for longest, cells in widths)
    assert [a is None for a in cut] == [b is None for b in full]
    assert sum(a is not None for a in cut) >= 6
    for a, b in zip(cut, full, strict=True):
        if a is not None:
            assert sorted(a[0]) == sorted(b[0]) and a[1] == pytest.approx(b[1], abs=1e-12)


def test_summed_tree_probability_over_refinements():
    # Brute force: sum p(fine tree) over the fine trees whose coarse image is the decoded tree.
    cname = [coarse_name(s) for s in REFINED.symbols]
    for words in SENTENCES:
        tree = decode(REFINED, [words], "max-rule-product")[0].tree
        target = sorted(tree.labeled_spans())
        total = 0.0
        for p, nodes, leaves, _ in all_trees(REFINED, words):
            spans = [(i, j, cname[a]) for i, _, j, a, _, _ in nodes]
            spans += [(i, i + 1, cname[x]) for i, x in enumerate(leaves)]
            if sorted(spans) == target:
                total += p
        assert tree_logprob_summed(REFINED, tree) == pytest.approx(math.log(total), abs=1e-10)


@pytest.mark.parametrize("decoder", ["mbr", "max-rule-product"])
def test_decoding_without_tree_logprobs_leaves_only_them_out(decoder):
    # The trees, objectives and log-likelihoods are the full decode's (checked against
    # enumeration above); only the trees' own log-probabilities are left out, and a posterior
    # asked of such a result is refused rather than made up.
    full = decode(REFINED, SENTENCES, decoder)
    lean = decode(REFINED, SENTENCES, decoder, tree_logprobs=False)
    for a, b in zip(full, lean):
        assert b.tree == a.tree and b.score == a.score and b.log_likelihood == a.log_likelihood
        assert a.tree_logprob > -math.inf and b.tree_logprob is None
        with pytest.raises(ValueError, match="tree_logprobs=True"):
            b.posterior


def test_unparseable_sentence_is_reported_not_dropped():
    g = make_grammar(["A"], ["P"], 2, seed=0)
    g.lexical[1, 1] = -math.inf  # the only preterminal can no longer emit w1
    out = decode(g, [["w0", "w1"], ["w0", "w0"]], "mbr")
    assert out[0].tree is None and out[0].log_likelihood == -math.inf and out[0].posterior == 0
    assert out[1].tree == Tree("A", [Tree("P", ["w0"]), Tree("P", ["w0"])])
    with pytest.raises(ValueError, match="unknown decoder"):
        decode(g, [["w0"]], "best")


def test_tree_scorer_batches_every_tree_alike():
    # Brute force: for every coarse tree of every sentence (all bracketings and coarse labels,
    # some mixing fine and coarse labels), the summed probability of its fine trees from the
    # tree list; all of them scored in one batch. A word the grammar does not know gives -inf.
    scorer = TreeScorer(REFINED)
    cname = [coarse_name(s) for s in REFINED.symbols]
    trees, expect = [], []
    for words in SENTENCES + [["w1"]]:
        sums = defaultdict(float)
        for p, nodes, leaves, _ in all_trees(REFINED, words):
            spans = [(i, j, cname[a]) for i, _, j, a, _, _ in nodes]
            spans += [(i, i + 1, cname[x]) for i, x in enumerate(leaves)]
            sums[tuple(sorted(spans))] += p
            # The same tree with its top labelled by the fine symbol: only that symbol counts.
            fine_top = [(i, j, REFINED.symbols[a] if (i, j) == (0, len(words)) else cname[a])
                        for i, _, j, a, _, _ in nodes] or [(0, 1, REFINED.symbols[leaves[0]])]
            fine_top += [(i, i + 1, cname[x]) for i, x in enumerate(leaves)
                         if len(words) > 1]
            sums[tuple(sorted(fine_top))] += p
        for spans, total in sums.items():
            trees.append(tree_from_spans(words, list(spans)))
            expect.append(math.log(total))
    trees.append(tree_from_spans(["w0", "zz"], [(0, 2, "S"), (0, 1, "P"), (1, 2, "P")]))
    expect.append(-math.inf)
    got = scorer.logprobs(trees)
    assert len(got) == len(expect) > 40
    for value, reference in zip(got, expect):
        assert value == pytest.approx(reference, abs=1e-10)


def test_tree_scorer_on_one_symbol_labels_sums_the_rules():
    # Brute force: on an unrefined grammar (every label one symbol, the scorer's sum of rules)
    # each tree's log probability is that of its one fine tree in the tree list; also for a
    # grammar whose nonterminals emit words, and a one-word sentence.
    for g in (make_grammar(["A", "B"], ["P", "R"], 3, seed=2),
              make_grammar(["A", "B"], ["P", "R"], 3, seed=4, nt_emit=True)):
        trees, expect = [], []
        for words in SENTENCES + [["w1"]]:
            for p, nodes, leaves, _ in all_trees(g, words):
                spans = [(i, j, g.symbols[a]) for i, _, j, a, _, _ in nodes]
                spans += [(i, i + 1, g.symbols[x]) for i, x in enumerate(leaves)]
                trees.append(tree_from_spans(words, spans))
                expect.append(math.log(p))
        got = TreeScorer(g).logprobs(trees)
        assert len(got) == len(expect) > 40
        for value, reference in zip(got, expect):
            assert value == pytest.approx(reference, abs=1e-10)


def test_a_chart_layout_over_its_memory_cap_is_never_made(monkeypatch):
    # The chart pass's layout of REFINED: 2 coarse parents (S, X), 4 coarse symbols, G = 2
    # subcategories: 2 * 2 * (4 * 2)**2 = 256 float64 entries, 2,048 bytes (counted by hand).
    monkeypatch.setattr(decode_module, "MRP_LAYOUT_AT_MOST", 2048)
    layout = decode_module.CoarseLayout.of(REFINED, torch.float64)       # at the cap: made
    assert layout.rules.numel() * 8 == 2048
    monkeypatch.setattr(decode_module, "MRP_LAYOUT_AT_MOST", 2047)
    layout = decode_module.CoarseLayout.of(REFINED, torch.float64)
    with pytest.raises(InputError, match=r"2 coarse nonterminals, 4 coarse symbols, at most 2 "
                                         r"subcategories a symbol.*decode it pruned"):
        layout.rules
    tables = span_tables(REFINED, [["w0", "w1"]])
    with pytest.raises(InputError, match=r"over the 0 GiB it takes"):
        max_rule_product(REFINED, tables, [2], layout, prune=False)
    # An unrefined grammar's chart pass reads the grammar itself: no cap applies.
    monkeypatch.setattr(decode_module, "MRP_LAYOUT_AT_MOST", 0)
    assert decode_module.CoarseLayout.of(make_grammar(["S", "X"], ["P", "Q"], 3, seed=1),
                                         torch.float64).chart_fits


@pytest.mark.parametrize("path", PATHS)
@pytest.mark.parametrize("nats_per_word, at_most", [(0.01, 1.0), (1.5, 1.0), (1.5, 0.0)])
def test_over_the_cap_every_sentence_takes_the_item_pass_exactly(monkeypatch, path,
                                                                  nats_per_word, at_most):
    # Brute force (coarse_objective) with no chart layout allowed: whatever the cost count
    # would choose (the item pass, or the chart pass forced by a huge ITEM_OVERHEAD), a floor
    # above every best tree (each sentence decoded again), the shipped floor, and every
    # sentence taken as diffuse (a known tree's floor), the chart pass never runs.
    monkeypatch.setattr(decode_module, "MRP_LAYOUT_AT_MOST", 0)
    monkeypatch.setattr(decode_module, "PRUNE_NATS_PER_WORD", nats_per_word)
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", at_most)
    monkeypatch.setattr(decode_module, "ITEM_OVERHEAD", PATHS[path])
    calls = spy_on_passes(monkeypatch)
    for grammar in (REFINED, SPARSE, MIXED):
        assert_max_rule_product_enumerated(grammar, SENTENCES)
    names = [name for name, _ in calls]
    assert "_max_rule_product_items" in names and "_max_rule_product_refined" not in names


def test_max_rule_product_on_an_unrefined_grammar_matches_enumeration():
    # Brute force (coarse_objective above): every symbol its own coarse symbol, the decoder's
    # max-semiring path; with preterminals, and with nonterminals that emit words (one word).
    cases = [(make_grammar(["A", "B", "C"], ["P", "R"], 3, seed=5), SENTENCES),
             (make_grammar(["A", "B"], ["P"], 3, seed=6, nt_emit=True),
              SENTENCES[:2] + [["w2"]])]
    for g, sentences in cases:
        for words in sentences:
            expect_value, expect_spans = coarse_objective(g, words)
            result = decode(g, [words], "max-rule-product")[0]
            assert result.score == pytest.approx(expect_value, abs=1e-9)
            assert sorted(result.tree.labeled_spans()) == expect_spans


@pytest.mark.parametrize("known_tree", [False, True], ids=["per-word", "known-tree"])
@pytest.mark.parametrize("path", PATHS)
@pytest.mark.parametrize("nats_per_word", [0.01, 1.5])
def test_pruned_max_rule_product_on_an_unrefined_grammar_matches_enumeration(
        monkeypatch, known_tree, path, nats_per_word):
    # Brute force (coarse_objective): the exact pruning with the floor forced on, on unrefined
    # grammars (the item pass with one subcategory a symbol, or the max-semiring pass, which
    # leaves nothing out; at 0.01 nats a word the floor is above every best tree, and the
    # max-semiring pass decodes each sentence again), with preterminals and with nonterminals
    # that emit words. These grammars' chart passes are cheap: the pruning is forced on.
    monkeypatch.setattr(decode_module, "UNREFINED_PRUNE_FROM", 0)
    monkeypatch.setattr(decode_module, "PRUNE_NATS_PER_WORD", nats_per_word)
    monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", 1.0)
    monkeypatch.setattr(decode_module, "ITEM_OVERHEAD", PATHS[path])
    monkeypatch.setattr(decode_module, "KNOWN_TREE_FROM", -1 if known_tree else 10 ** 18)
    # The anchored rules of each floored item pass (the known tree's floor has its own): on
    # the chart path it runs only where the floor left none, and then costs nothing (as
    # check_paths says).
    weighed = []
    real_items = decode_module._max_rule_product_items

    def items(grammar, tables, lengths, lay, *args, **kwargs):
        if "kept" in kwargs:
            rules = decode_module._pass_costs(kwargs["kept"], lay, torch.tensor(lengths))[0]
            weighed.append(int(rules.sum()))
        return real_items(grammar, tables, lengths, lay, *args, **kwargs)

    monkeypatch.setattr(decode_module, "_max_rule_product_items", items)
    cases = [(make_grammar(["A", "B", "C"], ["P", "R"], 3, seed=5), SENTENCES),
             (random_grammar(3, 3, 3, seed=11, sparsity=0.35), SENTENCES),
             (make_grammar(["A", "B"], ["P"], 3, seed=6, nt_emit=True),
              SENTENCES[:2] + [["w2"]])]
    for g, sentences in cases:
        assert_max_rule_product_enumerated(g, sentences)
    if path == "items":     # at 0.01 nats a word the floor keeps no rule: called, for none
        assert any(weighed) if nats_per_word == 1.5 else weighed
    else:
        assert not any(weighed)


def test_max_rule_product_on_a_small_unrefined_grammar_takes_the_chart_pass(monkeypatch):
    # Brute force (coarse_objective): an unrefined grammar whose whole chart pass costs less
    # than UNREFINED_PRUNE_FROM a sentence goes to the max-semiring pass without seeking a
    # floor, a known tree or the item pass, and gives the best trees.
    calls = spy_on_passes(monkeypatch)
    grammar = random_grammar(3, 3, 3, seed=11, sparsity=0.35)
    layout = decode_module.CoarseLayout.of(grammar, torch.float64)
    lengths = torch.tensor([len(w) for w in SENTENCES])
    assert float(decode_module._viterbi_cost(lengths, layout).max()) < \
        decode_module.UNREFINED_PRUNE_FROM
    assert_max_rule_product_enumerated(grammar, SENTENCES)
    assert calls == []


def _factored_rules(kind: str, nt: int, t: int, v: int, rank: int, init_scale: float, seed: int,
                    dtype: torch.dtype):
    """Random factored rules: independent productions (`init_scale`), or low-rank rules of
    `rank` with their nearly uniform initial rules sharpened (embeddings times 8)."""
    from treewright.params import IndependentParams, LowRankParams
    gen = torch.Generator().manual_seed(seed)
    if kind == "independent":
        model = IndependentParams(nt, t, v, init_scale=init_scale, generator=gen, dtype=dtype)
    else:
        model = LowRankParams(nt, t, v, rank, dim=8, blocks=1, generator=gen, dtype=dtype)
    with torch.no_grad():
        if kind != "independent":
            for p in (model.symbol_embeddings, model.rank_embeddings, model.start_embedding):
                p.mul_(8.0)
        return model.rules()


@pytest.mark.parametrize("decoder,depth", [("mbr", None), ("max-rule-product", 16),
                                           ("max-rule-product", 2)])
@pytest.mark.parametrize("kind", ["independent", "lowrank", "lowrank, items"])
def test_factored_decoders_equal_theirs_on_the_implied_dense_grammar(monkeypatch, kind, decoder,
                                                                      depth):
    # Reference: decode(..., decoder) on the Grammar of the dense rules the factors imply (both
    # decoders are checked against enumeration above): the same trees, log-likelihoods,
    # objectives (expected numbers of correct spans; log rule-posterior products) and tree
    # log-probabilities; a one-word sentence (no parse in the induction layout) and one with
    # an unknown word get no tree from either. The factored max-rule-product is the item pass
    # alone, under a known tree's floor (`_max_rule_product_factored`) for low-rank rules, and
    # the chart pass of `_max_rule_product_independent` for independent productions (with 2
    # candidate columns its bounds leave some entries to the pass over every column). Low-rank
    # rules decode on their dense grammar when it is small, else ("lowrank, items") by the item
    # pass alone.
    if kind == "lowrank, items":
        monkeypatch.setattr(decode_module, "LOWRANK_DENSE_AT_MOST", 0)
    if depth is not None:
        monkeypatch.setattr(maxplus, "TOP_COLUMNS", depth)
        monkeypatch.setattr(maxplus, "BOUNDED_FROM", 0)
        monkeypatch.setattr(maxplus, "CANDIDATE_SHARE", 1.0)
    from treewright.params.tabular import rules_to_grammar, symbol_names
    rules = _factored_rules(kind, 4, 5, 5, 6, 2.0, seed=4, dtype=torch.float64)
    vocab = Vocabulary([f"w{i}" for i in range(5)], unk=None)
    nonterminals, preterminals = symbol_names(4, 5)
    grammar = rules_to_grammar(rules.dense(), nonterminals, preterminals, vocab)
    draw = torch.Generator().manual_seed(5)
    sentences = [[f"w{int(k)}" for k in torch.randint(0, 5, (n,), generator=draw)]
                 for n in (7, 2, 12, 1, 9, 5, 10)]
    sentences[4][3] = "zz"
    got = decode_module.decode_factored(rules, vocab, nonterminals, preterminals, sentences,
                                        batch_size=3, decoder=decoder)
    want = decode(grammar, sentences, decoder)
    assert [g.tree is None for g in got] == [w.tree is None for w in want] == \
        [False, False, False, True, True, False, False]
    for g, w in zip(got, want):
        if w.tree is None:
            continue
        assert g.tree.to_string() == w.tree.to_string()
        assert g.log_likelihood == pytest.approx(w.log_likelihood, abs=1e-9)
        assert g.score == pytest.approx(w.score, abs=1e-9)
        assert g.tree_logprob == pytest.approx(w.tree_logprob, abs=1e-9)


@pytest.mark.parametrize("kind,depth", [("independent", 16), ("independent", 2),
                                        ("lowrank", 2)])
def test_factored_max_rule_product_in_float32_finds_the_float64_trees(monkeypatch, kind, depth):
    # Reference: decode(..., "max-rule-product") in float64 on the implied dense grammar
    # (checked against enumeration above). Runs of factored rules decode in their float32; the
    # bound and the known tree's floor then leave room for float32 rounding (`_slack`), so
    # every parsed sentence still gets its tree, the same one here (no near-ties), with the
    # objective equal to float32 precision. Low-rank rules this small decode on their dense
    # grammar, in float32.
    monkeypatch.setattr(maxplus, "TOP_COLUMNS", depth)
    monkeypatch.setattr(maxplus, "BOUNDED_FROM", 0)
    monkeypatch.setattr(maxplus, "CANDIDATE_SHARE", 1.0)
    from treewright.params.tabular import rules_to_grammar, symbol_names
    rules = _factored_rules(kind, 6, 8, 6, 10, 3.0, seed=8, dtype=torch.float32)
    vocab = Vocabulary([f"w{i}" for i in range(6)], unk=None)
    nonterminals, preterminals = symbol_names(6, 8)
    dense = rules.dense()
    grammar = rules_to_grammar(type(dense)(*(x.double() for x in dense)), nonterminals,
                               preterminals, vocab)
    draw = torch.Generator().manual_seed(9)
    sentences = [[f"w{int(k)}" for k in torch.randint(0, 6, (n,), generator=draw)]
                 for n in (14, 3, 9, 20, 6, 11)]
    got = decode_module.decode_factored(rules, vocab, nonterminals, preterminals, sentences,
                                        decoder="max-rule-product")
    want = decode(grammar, sentences, "max-rule-product")
    for g, w in zip(got, want, strict=True):
        assert g.tree is not None and g.tree.to_string() == w.tree.to_string()
        assert g.score == pytest.approx(w.score, rel=1e-4, abs=1e-4)


def test_lowrank_max_rule_product_refuses_posteriors_too_flat_for_it(monkeypatch):
    # Common practice (a clear refusal rather than the system's out-of-memory killer): low-rank
    # rules too large for their dense tensor have no pass over the whole chart, so a sentence
    # whose posteriors leave more anchored rules than the item pass takes is refused with the
    # count and the way out. (Independent productions have one:
    # `_max_rule_product_independent`; small low-rank rules decode on their dense grammar, which
    # has one: both tested above.)
    from treewright.errors import InputError
    from treewright.params import LowRankParams
    from treewright.params.tabular import symbol_names
    model = LowRankParams(3, 4, 4, 5, dim=8, blocks=1, generator=torch.Generator().manual_seed(2),
                          dtype=torch.float64)
    with torch.no_grad():
        rules = model.rules()
    vocab = Vocabulary([f"w{i}" for i in range(4)], unk=None)
    nonterminals, preterminals = symbol_names(3, 4)
    sentence = [["w0", "w1", "w2", "w3", "w1"]]
    ok = decode_module.decode_factored(rules, vocab, nonterminals, preterminals, sentence,
                                       decoder="max-rule-product")
    assert ok[0].tree is not None
    monkeypatch.setattr(decode_module, "FACTORED_RULES_AT_MOST", 0)
    dense = decode_module.decode_factored(rules, vocab, nonterminals, preterminals, sentence,
                                          decoder="max-rule-product")      # the dense grammar
    assert dense[0].tree.to_string() == ok[0].tree.to_string()
    monkeypatch.setattr(decode_module, "LOWRANK_DENSE_AT_MOST", 0)
    with pytest.raises(InputError, match=r"sentence of 5 words leave [\d,]+ anchored rules"
                                         r".*decode with mbr"):
        decode_module.decode_factored(rules, vocab, nonterminals, preterminals, sentence,
                                      decoder="max-rule-product")


# ---- decoding under the word-piece constraint (treewright.word_pieces) -----------------------

PIECE_WORDS = ["w2", "w0", "w1", "w0", "w2"]
PIECE_BARRED = [1, 3, 4]        # written words (0, 2) and (2, 5): barred_positions of the joins


def allowed_by(side: str, barred):
    """The bracketings the constraint allows: no span of two or more words starts at a barred
    position (host first) or ends just before one (host last)."""
    def keep(brackets) -> bool:
        return not any((i if side == "first" else j) in barred for i, _, j in brackets)
    return keep


def spans_of(tree) -> set:
    return {(i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2}


@pytest.mark.parametrize("side", ["first", "last"])
def test_viterbi_and_mbr_under_the_word_piece_constraint_match_enumeration(side):
    # Brute force over the trees the constraint allows (the constraint as tests/
    # test_word_pieces.py checks that training sums it): their most probable tree, their
    # summed probability, and the allowed bracketing with the most expected correct spans.
    from treewright.word_pieces import barred_positions
    assert barred_positions([False, True, False, True, True]) == PIECE_BARRED
    g = make_grammar(["A", "B", "C"], ["P", "R"], 3, seed=5)
    words, n = PIECE_WORDS, len(PIECE_WORDS)
    keep = allowed_by(side, PIECE_BARRED)
    assert 0 < sum(map(keep, bracketings(0, n))) < len(bracketings(0, n))
    allowed = list(all_trees(g, words, keep))
    total = sum(p for p, *_ in allowed)
    pieces = (side, [PIECE_BARRED])
    best = decode(g, [words], "viterbi", pieces=pieces)[0]
    assert best.tree_logprob == pytest.approx(math.log(max(p for p, *_ in allowed)), abs=1e-10)
    assert best.log_likelihood == pytest.approx(math.log(total), abs=1e-10)
    span_p = defaultdict(float)
    for p, nodes, _, _ in allowed:
        for i, _, j, *_ in nodes:
            span_p[(i, j)] += p / total
    expect = max(sum(span_p[(i, j)] for i, _, j in b) for b in bracketings(0, n) if keep(b))
    result = decode(g, [words], "mbr", pieces=pieces)[0]
    assert result.score == pytest.approx(expect, abs=1e-10)
    assert result.log_likelihood == pytest.approx(math.log(total), abs=1e-10)
    for tree in (best.tree, result.tree):
        assert keep([(i, None, j) for i, j in spans_of(tree)])
    # The unconstrained decoders pick a barred tree here, so the constraint did something.
    free = decode(g, [words], "mbr")[0]
    assert not keep([(i, None, j) for i, j in spans_of(free.tree)])


@pytest.mark.parametrize("side", ["first", "last"])
@pytest.mark.parametrize("refined", [True, False], ids=["refined", "unrefined"])
@pytest.mark.parametrize("path", [None, "items", "chart"])
def test_max_rule_product_under_the_word_piece_constraint_matches_enumeration(
        monkeypatch, side, refined, path):
    # Brute force (`coarse_objective`) with the rule posteriors and the candidate trees both
    # taken over the allowed trees alone, on a refined grammar and on an unrefined one (whose
    # chart pass is the max-semiring one), by the pass the cost count picks or with the floor
    # forced on and each floored pass forced (as in the pruning test above). Written word
    # (1, 3): position 2 barred, which bars the tree max-rule-product takes on the refined
    # grammar without the constraint.
    if path is not None:
        monkeypatch.setattr(decode_module, "PRUNE_AT_MOST", 1.0)
        monkeypatch.setattr(decode_module, "ITEM_OVERHEAD", PATHS[path])
        monkeypatch.setattr(decode_module, "KNOWN_TREE_FROM", -1)
    grammar = REFINED if refined else make_grammar(["A", "B", "C"], ["P", "R"], 3, seed=5)
    words, barred = PIECE_WORDS[:4], [2]
    keep = allowed_by(side, barred)
    if refined:
        free = decode(grammar, [words], "max-rule-product")[0]
        assert not keep([(i, None, j) for i, j in spans_of(free.tree)])
    expect_value, expect_spans = coarse_objective(grammar, words, keep=keep)
    result = decode(grammar, [words], "max-rule-product", pieces=(side, [barred]))[0]
    assert result.score == pytest.approx(expect_value, abs=1e-9)
    assert sorted(result.tree.labeled_spans()) == expect_spans


@pytest.mark.parametrize("side", ["first", "last"])
def test_consensus_under_the_word_piece_constraint_averages_allowed_trees(side):
    # Each grammar's constrained mbr tree votes; the average is the allowed bracketing with
    # the most votes (brute force over bracketings), and a sentence without a barred
    # position decodes as without the constraint.
    grammars = [make_grammar(["A", "B", "C"], ["P", "R"], 3, seed=s) for s in (5, 6)]
    words, n = PIECE_WORDS, len(PIECE_WORDS)
    keep = allowed_by(side, PIECE_BARRED)
    voters = [spans_of(decode(g, [words], "mbr", pieces=(side, [PIECE_BARRED]))[0].tree)
              for g in grammars]
    most = max(sum(sum((i, j) in v for v in voters) for i, _, j in b)
               for b in bracketings(0, n) if keep(b))
    (result,) = consensus(grammars, [words], pieces=(side, [PIECE_BARRED]))
    kept = spans_of(result.tree)
    assert keep([(i, None, j) for i, j in kept])
    assert sum(sum(s in v for v in voters) for s in kept) == most
    plain, free = (consensus(grammars, [["w1", "w0", "w2"]], pieces=p)[0] for p in
                   ((side, [[]]), None))
    assert plain.tree.to_string() == free.tree.to_string()
