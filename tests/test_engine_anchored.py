"""The compiled loops of max-rule-product (`engine.anchored`: the item pass, and the chart pass
width by width), against a plain Python walk over every anchored rule (brute force over the
rules the docstrings define). That these recursions are max-rule-product's objective is checked
against enumeration of every tree in tests/test_decode.py."""

import math
import random

import pytest
import torch

from treewright.engine import anchored


def random_items(seed: int, K: int = 4, G: int = 3, B: int = 2, N: int = 5,
                 uneven: bool = True):
    """Random items over B sentences of N words: every cell of width one holds 1-2 labels, wider
    cells 0-3 coarse parents (symbols below Kp = K - 1), laid out as the decoder lists them;
    random nonnegative scores with some zero slots, fine rules with some zero entries. With
    `uneven`, coarse symbols have 1 to G subcategories (scores 0 in unused slots, as the
    decoder gives them), and a coarse parent may have a preterminal subcategory, which parents
    no rule (its outside score is left nonzero: the loop must not read it)."""
    rng = random.Random(seed)
    Kp = K - 1
    cells = {}
    for b in range(B):
        for w in range(1, N + 1):
            for i in range(N - w + 1):
                pool = range(K) if w == 1 else range(Kp)
                count = rng.randint(1, 2) if w == 1 else rng.randint(0, 3)
                cells[b, i, w] = sorted(rng.sample(list(pool), min(count, len(pool))))
    rows = []                                    # (sentence, start, width, symbol)
    cell_first = torch.zeros((B, N + 1, N + 1), dtype=torch.long)
    cell_count = torch.zeros((B, N + 1, N + 1), dtype=torch.long)
    for (b, i, w), labels in sorted(cells.items()):
        cell_first[b, i, w], cell_count[b, i, w] = len(rows), len(labels)
        rows += [(b, i, w, x) for x in labels]
    items = len(rows)
    gen = torch.Generator().manual_seed(seed)
    # Subcategories: (nonterminal ones, preterminal ones) per coarse symbol; fine nonterminals
    # are numbered first, as in a grammar.
    kinds = [(rng.randint(1, G), 0) if k < Kp else (0, rng.randint(1, G)) for k in range(K)]
    if uneven:
        nts = rng.randint(1, G - 1)
        kinds[0] = (nts, G - nts)                        # a parent with a preterminal slot
    else:
        kinds = [(G, 0)] * Kp + [(0, G)]
    nt = sum(a for a, _ in kinds)
    S = nt + sum(t for _, t in kinds)
    slots = torch.full((K, G), S, dtype=torch.long)
    next_nt, next_pt = 0, nt
    for k, (a, t) in enumerate(kinds):
        slots[k, :a] = torch.arange(next_nt, next_nt + a)
        slots[k, a:a + t] = torch.arange(next_pt, next_pt + t)
        next_nt, next_pt = next_nt + a, next_pt + t
    used = torch.tensor([a + t for a, t in kinds])

    def scores(symbols):
        x = torch.rand((len(symbols), G), generator=gen, dtype=torch.float64)
        x = x.masked_fill(torch.rand((len(symbols), G), generator=gen) < 0.3, 0.0)
        return x.masked_fill(torch.arange(G) >= used[symbols][:, None], 0.0)

    ib, ii, iw, ik = torch.tensor(rows, dtype=torch.long).t()
    parents = (iw > 1).nonzero().flatten()
    parents = parents[iw[parents].argsort(stable=True)]
    binary = torch.rand((nt, S, S), generator=gen, dtype=torch.float64)
    binary = binary.masked_fill(torch.rand(binary.shape, generator=gen) < 0.2, 0.0)
    best = torch.where(iw == 1, -torch.rand(items, generator=gen, dtype=torch.float64) * 3,
                       -math.inf)
    return dict(binary=binary, slots=slots, parent=scores(ik[parents]),
                parent_max=torch.randn(len(parents), generator=gen, dtype=torch.float64),
                inside=scores(ik),
                inside_max=torch.randn(items, generator=gen, dtype=torch.float64),
                ib=ib, ii=ii, iw=iw, ik=ik, cell_first=cell_first, cell_count=cell_count,
                parents=parents, best=best)


def block_of(d, x, y, z):
    """The (G, G, G) rules of coarse rule x -> y z by subcategory slot, 0 where a slot is
    unused or is no nonterminal of the parent (the rules by coarse rule, as the docstring
    defines them)."""
    G = d["slots"].shape[1]
    nt, S = d["binary"].shape[:2]
    block = torch.zeros((G, G, G), dtype=torch.float64)
    for a in range(G):
        for b in range(G):
            for c in range(G):
                fa, fb, fc = (int(d["slots"][k, g]) for k, g in ((x, a), (y, b), (z, c)))
                if fa < nt and fb < S and fc < S:
                    block[a, b, c] = d["binary"][fa, fb, fc]
    return block


def rules_of(d):
    """Every anchored rule in the loop's order: (parent row, left item, right item)."""
    out = []
    for p, item in enumerate(d["parents"].tolist()):
        b, i, w = int(d["ib"][item]), int(d["ii"][item]), int(d["iw"][item])
        for u in range(1, w):
            f, c = int(d["cell_first"][b, i, u]), int(d["cell_count"][b, i, u])
            rf, rc = int(d["cell_first"][b, i + u, w - u]), int(d["cell_count"][b, i + u, w - u])
            out += [(p, lft, rgt) for lft in range(f, f + c) for rgt in range(rf, rf + rc)]
    return out


def log_q_of(d, p, lft, rgt) -> float:
    """log q of one anchored rule, every term of the triple sum taken."""
    G = d["parent"].shape[1]
    x = int(d["ik"][d["parents"][p]])
    block = block_of(d, x, int(d["ik"][lft]), int(d["ik"][rgt]))
    total = sum(float(d["parent"][p, a] * block[a, b, c] * d["inside"][lft, b] *
                      d["inside"][rgt, c])
                for a in range(G) for b in range(G) for c in range(G))
    return (math.log(total) if total > 0 else -math.inf) + float(d["parent_max"][p]) + \
        float(d["inside_max"][lft]) + float(d["inside_max"][rgt])


def reference(d):
    """The recursion over every rule, narrow parents first: each parent's best is the first
    rule with the largest log q + best(left) + best(right)."""
    best = d["best"].tolist()
    back = {}
    rules = rules_of(d)
    for p, item in enumerate(d["parents"].tolist()):
        top, arg = -math.inf, None
        for _, lft, rgt in (r for r in rules if r[0] == p):
            score = log_q_of(d, p, lft, rgt) + best[lft] + best[rgt]
            if arg is None or score > top:
                top, arg = score, (lft, rgt)
        best[item] = top
        back[item] = arg if arg is not None else (-1, -1)
    return best, back


def run(d, log_mu, log_q=None, blocks=True):
    best = d["best"].clone()
    back = anchored.best_derivations(d["binary"] if blocks else None, d["slots"], d["parent"],
                                     d["parent_max"], d["inside"], d["inside_max"], log_mu,
                                     d["ib"], d["ii"], d["iw"], d["ik"], d["cell_first"],
                                     d["cell_count"], d["parents"], best, log_q)
    return best, back


def check(d, best, back):
    expect_best, expect_back = reference(d)
    items = d["parents"].tolist()
    assert best[items].tolist() == pytest.approx([expect_best[k] for k in items], abs=1e-12)
    assert [tuple(back[k].tolist()) for k in items] == [expect_back[k] for k in items]
    words = (d["iw"] == 1).nonzero().flatten()
    assert torch.equal(best[words], d["best"][words])           # words are left as given


@pytest.mark.parametrize("seed", range(6))
def test_best_derivations_equal_every_rule_walked(seed):
    d = random_items(seed)
    assert len(rules_of(d)) > 20
    no_bound = torch.full((len(d["ib"]),), math.inf, dtype=torch.float64)
    check(d, *run(d, no_bound))


@pytest.mark.parametrize("seed", range(6))
def test_the_bound_leaves_out_only_rules_that_cannot_win(seed):
    # With each item's log_mu at the largest log q of any rule it takes part in (a valid upper
    # bound, as a label marginal is for real posteriors), the bound leaves rules out, yet every
    # best and back pointer is the same.
    d = random_items(seed)
    log_mu = torch.full((len(d["ib"]),), -math.inf, dtype=torch.float64)
    for p, lft, rgt in rules_of(d):
        q = log_q_of(d, p, lft, rgt) + 1e-9
        for item in (int(d["parents"][p]), lft, rgt):
            log_mu[item] = max(float(log_mu[item]), q)
    check(d, *run(d, log_mu))


def test_factored_rules_read_each_rule_s_log_q_in_order():
    # Without the rules, the loop reads log q per anchored rule in its own order: given the
    # reference's log q, it finds the same bests as with the rules.
    d = random_items(3)
    log_q = torch.tensor([log_q_of(d, *r) for r in rules_of(d)], dtype=torch.float64)
    no_bound = torch.full((len(d["ib"]),), math.inf, dtype=torch.float64)
    check(d, *run(d, no_bound, log_q=log_q, blocks=False))


def tied_items(seed: int):
    """`random_items` with every subcategory slot used, every fine rule and every score equal:
    every rule's log q is the same."""
    d = random_items(seed, uneven=False)
    d["binary"].fill_(0.5)
    d["parent"].fill_(1.0)
    d["inside"].fill_(1.0)
    d["parent_max"].zero_()
    d["inside_max"].zero_()
    return d


def test_ties_go_to_the_first_rule():
    # Every score equal too: each parent's rules tie, and the first (narrowest left child,
    # then first left and right item) wins.
    d = tied_items(1)
    d["best"] = torch.where(d["iw"] == 1, 0.0, -math.inf).to(torch.float64)
    no_bound = torch.full((len(d["ib"]),), math.inf, dtype=torch.float64)
    best, back = run(d, no_bound)
    check(d, best, back)


def test_ties_go_to_the_first_rule_under_the_bound_too():
    # As above, with each label's log_mu at the rules' common log q (a valid bound): rules of
    # lower children's bests are left out by it, and of the tied ones visited best-first the
    # first in (split, left item, right item) order still wins.
    d = tied_items(2)
    gen = torch.Generator().manual_seed(2)
    # Words' bests from two values, so that many rules tie and some are bounded out.
    d["best"] = torch.where(d["iw"] == 1, -torch.randint(0, 2, (len(d["iw"]),), generator=gen)
                            .to(torch.float64), -math.inf)
    log_mu = torch.full((len(d["ib"]),), max(log_q_of(d, *r) for r in rules_of(d)) + 1e-9,
                        dtype=torch.float64)
    check(d, *run(d, log_mu))


def test_without_rules_or_log_q_it_refuses():
    d = random_items(0)
    with pytest.raises(ValueError, match="rules and their slots or every rule's log q"):
        run(d, d["best"], log_q=None, blocks=False)


def splits_reference(rules, parent, child, scale, w, Kp):
    """`anchored.best_splits` by a plain walk: per (span row, parent), every split and every
    (y, z) the edges allow, each sum over a, b and c taken term by term."""
    B, N1, _, G, K = child.shape
    P = N1 - w
    rules = rules.view(Kp, G, G, K, G, K)                              # [x, a, c, y, b, z]
    out = {}
    for r in range(B * P):
        sb, si = divmod(r, P)
        for x in range(Kp):
            best = None
            for u in range(1, w):
                ky = K if u == 1 else Kp
                kz = K if u == w - 1 else Kp
                top = None
                for y in range(ky):
                    for z in range(kz):
                        s = sum(float(parent[r, x, a] * rules[x, a, c, y, b, z] *
                                      child[sb, si, u, b, y] * child[sb, si + u, w - u, c, z])
                                for a in range(G) for b in range(G) for c in range(G))
                        if top is None or s > top[0] + 1e-12:
                            top = (s, y, z)
                score = (math.log(top[0]) if top[0] > 0 else -math.inf) + \
                    float(scale[sb, si, u] + scale[sb, si + u, w - u])
                if best is None or score > best[0] + 1e-12:
                    best = (score, u, top[1], top[2])
            out[r, x] = best
    return out


@pytest.mark.parametrize("tied", [False, True])
@pytest.mark.parametrize("w", [2, 3, 4])
def test_best_splits_equal_a_plain_walk(w, tied):
    # Reference: every split and child pair of every (span, parent) walked in Python. Tied:
    # every rule, outside score and child score equal, so that every split and pair tie and
    # the first split, then the first (y, z), must win.
    Kp, K, G, B, N = 2, 3, 2, 2, 4
    gen = torch.Generator().manual_seed(w)
    rules = torch.rand((Kp, G, G * K * G * K), generator=gen, dtype=torch.float64)
    child = torch.rand((B, N + 1, N + 1, G, K), generator=gen, dtype=torch.float64)
    scale = torch.randn((B, N + 1, N + 1), generator=gen, dtype=torch.float64)
    P = N + 1 - w
    parent = torch.rand((B * P, Kp, G), generator=gen, dtype=torch.float64)
    if tied:
        for x in (rules, child, parent):
            x.fill_(0.5)
        scale.zero_()
    value = torch.full((B * P, Kp), math.nan, dtype=torch.float64)
    arg = torch.full((B * P, Kp, 3), -1, dtype=torch.long)
    anchored.best_splits(rules, parent, child, scale, torch.arange(B * P), None, w, Kp, value,
                         arg)
    for (r, x), (score, u, y, z) in splits_reference(rules, parent, child, scale, w,
                                                     Kp).items():
        assert float(value[r, x]) == pytest.approx(score, abs=1e-12)
        assert arg[r, x].tolist() == [u, y, z]
    # One parent per row asked for: the others are left as they were.
    value.fill_(math.nan)
    anchored.best_splits(rules, parent, child, scale, torch.arange(B * P),
                         torch.ones(B * P, dtype=torch.long), w, Kp, value, arg)
    assert torch.isnan(value[:, 0]).all() and not torch.isnan(value[:, 1]).any()
