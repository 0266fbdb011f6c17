"""Brute force over every tree of a short sentence: the independent reference for the engine.

Enumerates every binary bracketing with every labelling explicitly (no dynamic programming),
so sums, maxima and expectations over trees are computed from their definitions.
"""

from __future__ import annotations

import math
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
