"""Brute force over every tree of a short sentence: the independent reference for the engine.

Enumerates every binary bracketing with every labelling explicitly (no dynamic programming),
so sums, maxima and expectations over trees are computed from their definitions.
"""

from __future__ import annotations

import math
from collections import defaultdict
from functools import lru_cache

import torch


def all_trees(grammar, words: list[str]):
    """Every tree of the sentence with its log-probability.

    Yields (logp, spans, rules) where spans is a tuple of (start, end, symbol) over all nodes
    and rules a tuple of ("root", A) / ("bin", A, B, C) / ("lex", X, pos) items."""
    nt = len(grammar.nonterminals)
    s = grammar.num_symbols
    ids = grammar.vocab.encode(words)
    binary = grammar.binary.double().tolist()
    lexical = grammar.lexical.double()
    n = len(words)

    @lru_cache(maxsize=None)
    def trees(i: int, j: int, a: int):
        out = []
        if j - i == 1:
            lp = float(lexical[a, ids[i]]) if ids[i] >= 0 else -math.inf
            if lp > -math.inf:
                out.append((lp, ((i, j, a),), (("lex", a, i),)))
            return out
        if a >= nt:
            return out
        for k in range(i + 1, j):
            for b in range(s):
                lefts = trees(i, k, b)
                if not lefts:
                    continue
                for c in range(s):
                    r = binary[a][b][c]
                    if r == -math.inf:
                        continue
                    for lp1, sp1, ru1 in lefts:
                        for lp2, sp2, ru2 in trees(k, j, c):
                            out.append((r + lp1 + lp2, ((i, j, a),) + sp1 + sp2,
                                        (("bin", a, b, c),) + ru1 + ru2))
        return out

    root = grammar.root.double().tolist()
    for a in range(nt):
        if root[a] == -math.inf:
            continue
        for lp, spans, rules in trees(0, n, a):
            yield root[a] + lp, spans, (("root", a),) + rules


def summary(grammar, words):
    """log Z, the best tree, and posterior expectations, all from the full enumeration."""
    items = list(all_trees(grammar, words))
    logz = torch.logsumexp(torch.tensor([lp for lp, _, _ in items], dtype=torch.float64), 0)
    best = max(items, key=lambda x: x[0])
    nt, s, n = len(grammar.nonterminals), grammar.num_symbols, len(words)
    counts = torch.zeros(nt, s, s, dtype=torch.float64)
    spans = torch.zeros(n + 1, n + 1, dtype=torch.float64)
    term = torch.zeros(n, s, dtype=torch.float64)
    for lp, sp, rules in items:
        p = math.exp(lp - float(logz))
        for r in rules:
            if r[0] == "bin":
                counts[r[1], r[2], r[3]] += p
            elif r[0] == "lex":
                term[r[2], r[1]] += p
        for i, j, _ in sp:
            if j - i >= 2:
                spans[i, j - i] += p
    return {"logz": float(logz), "best": best, "counts": counts, "spans": spans,
            "term": term, "trees": items}


def lexicalized_trees(n: int, nt: int, t: int):
    """Every lexicalized binary tree over n words: every bracketing, every head choice (which
    child keeps the head at each node) and every labelling (preterminals over one word,
    nonterminals above). Returns a list of (symbol, head, nodes, leaves) for the whole
    sentence: nodes hold (i, j, A, h, side, head_child_symbol, dependent_symbol, dependent_head)
    per binary node (side 0: head child on the left), leaves (i, T) per word; symbols index the
    joint list, nonterminals first."""

    @lru_cache(maxsize=None)
    def trees(i: int, j: int):
        if j - i == 1:
            return [(nt + k, i, (), ((i, nt + k),)) for k in range(t)]
        out = []
        for k in range(i + 1, j):
            for ls, lh, ln, ll in trees(i, k):
                for rs, rh, rn, rl in trees(k, j):
                    for side in (0, 1):
                        h, hsym, dsym, dh = (lh, ls, rs, rh) if side == 0 else (rh, rs, ls, lh)
                        for a in range(nt):
                            out.append((a, h, ((i, j, a, h, side, hsym, dsym, dh),) + ln + rn,
                                        ll + rl))
        return out

    return trees(0, n)


def lexicalized_summary(factors, b: int, n: int, allowed=None):
    """log Z, the best derivation and the expected count of every factor entry for sentence b
    (length n) of a `LexicalizedFactors` batch, from the full enumeration of
    `lexicalized_trees` (those whose set of spans (i, j) of width >= 2 `allowed` accepts, when
    given). A rule's probability is its definition, the sum over the latent class of the
    product of the four factors; the best derivation also picks the class at each node (max
    over classes, node by node, is the max over every assignment of classes)."""
    B, N, nt, r_count = factors.head.shape
    s = factors.root.shape[-1]
    root = factors.root[b].double().tolist()
    head = factors.head[b].double().tolist()
    head_child = factors.head_child.double().tolist()
    dep_child = factors.dep_child.double().tolist()
    dep_word = factors.dep_word[b].double().tolist()
    terminal = (factors.terminal[b].double().tolist() if factors.terminal is not None
                else [[0.0] * (s - nt) for _ in range(N)])

    @lru_cache(maxsize=None)
    def node_terms(node):
        i, j, a, h, side, hsym, dsym, dh = node
        terms = [head[h][a][r] + head_child[r][side][hsym] + dep_child[r][dsym] + dep_word[dh][r]
                 for r in range(r_count)]
        top = max(terms)
        total = top + math.log(sum(math.exp(x - top) for x in terms))
        return total, top, [math.exp(x - total) for x in terms]

    scored = []
    for a, h, nodes, leaves in lexicalized_trees(n, nt, s - nt):
        if allowed is not None and not allowed({(i, j) for i, j, *_ in nodes}):
            continue
        base = root[h][a] + sum(terminal[i][k - nt] for i, k in leaves)
        scored.append((base + sum(node_terms(x)[0] for x in nodes),
                       base + sum(node_terms(x)[1] for x in nodes), a, h, nodes, leaves))
    logz = torch.logsumexp(torch.tensor([x[0] for x in scored], dtype=torch.float64), 0)
    best = max(scored, key=lambda x: x[1])
    counts = {"root": torch.zeros(N, s, dtype=torch.float64),
              "head": torch.zeros(N, nt, r_count, dtype=torch.float64),
              "head_child": torch.zeros(r_count, 2, s, dtype=torch.float64),
              "dep_child": torch.zeros(r_count, s, dtype=torch.float64),
              "dep_word": torch.zeros(N, r_count, dtype=torch.float64),
              "terminal": torch.zeros(N, s - nt, dtype=torch.float64)}
    # Posterior mass per root choice, leaf and binary node, summed over the trees that hold it,
    # then spread over the latent classes by each node's own posterior.
    root_mass, leaf_mass, node_mass = defaultdict(float), defaultdict(float), defaultdict(float)
    for logp, _, a, h, nodes, leaves in scored:
        p = math.exp(logp - float(logz))
        root_mass[h, a] += p
        for leaf in leaves:
            leaf_mass[leaf] += p
        for node in nodes:
            node_mass[node] += p
    for (h, a), p in root_mass.items():
        counts["root"][h, a] += p
    for (i, k), p in leaf_mass.items():
        counts["terminal"][i, k - nt] += p
    span_mass: dict = defaultdict(float)   # (i, j) -> p(span is a constituent), width >= 2
    for node, p in node_mass.items():
        i, j, a, h, side, hsym, dsym, dh = node
        span_mass[i, j] += p   # a tree has one node per span, so the nodes' masses add up
        for r, q in enumerate(node_terms(node)[2]):
            counts["head"][h, a, r] += p * q
            counts["head_child"][r, side, hsym] += p * q
            counts["dep_child"][r, dsym] += p * q
            counts["dep_word"][dh, r] += p * q
    _, best_score, a, h, nodes, leaves = best
    spans = sorted([(i, j, a_, h_) for i, j, a_, h_, *_ in nodes]
                   + [(i, i + 1, k, i) for i, k in leaves], key=lambda x: (x[0], -x[1]))
    heads = [0] * n
    for *_, h_, _, _, _, dh in nodes:
        heads[dh] = h_ + 1
    return {"logz": float(logz), "best_score": best_score, "best_spans": spans,
            "best_heads": heads, "counts": counts, "spans": dict(span_mass),
            "trees": len(scored)}
