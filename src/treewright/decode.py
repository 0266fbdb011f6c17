"""Decoding a sentence's tree from posterior span marginals.

`mbr_spans` is minimum-Bayes-risk decoding for unlabeled bracket recall: the binary tree that
maximizes the sum of its spans' posterior probabilities (Goodman 1996, "Parsing Algorithms and
Metrics"), found by a small CKY over the marginals.
"""

from __future__ import annotations

from torch import Tensor


def mbr_spans(span_marginals: Tensor, length: int) -> list[tuple[int, int]]:
    """The spans (start, end) of width >= 2 of the best binary tree over `length` words.

    span_marginals: (N+1, N+1) indexed [start, width], as in `engine.Posteriors.spans` for one
        sentence (N >= length). Ties go to the leftmost split, so the result is deterministic.
    Returns n - 1 spans, the whole sentence included, for n >= 2; [] for one word.
    """
    n = length
    if n < 2:
        return []
    gain = span_marginals.double().tolist()
    best: dict[tuple[int, int], float] = {(i, i + 1): 0.0 for i in range(n)}
    split: dict[tuple[int, int], int] = {}
    for width in range(2, n + 1):
        for i in range(0, n - width + 1):
            j = i + width
            k_best, v_best = i + 1, float("-inf")
            for k in range(i + 1, j):
                v = best[(i, k)] + best[(k, j)]
                if v > v_best:
                    k_best, v_best = k, v
            best[(i, j)] = v_best + gain[i][width]
            split[(i, j)] = k_best
    out: list[tuple[int, int]] = []
    stack = [(0, n)]
    while stack:
        i, j = stack.pop()
        if j - i < 2:
            continue
        out.append((i, j))
        k = split[(i, j)]
        stack.extend([(k, j), (i, k)])
    return out
