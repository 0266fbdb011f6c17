"""MBR decoding over span marginals against brute force over every binary bracketing."""

from __future__ import annotations

import itertools

import pytest
import torch

from treewright.decode import mbr_spans


def _bracketings(i, j):
    if j - i == 1:
        yield frozenset()
        return
    for k in range(i + 1, j):
        for left, right in itertools.product(list(_bracketings(i, k)), list(_bracketings(k, j))):
            yield left | right | {(i, j)}


def test_mbr_tree_maximizes_the_sum_of_span_marginals():
    # Reference: brute force over all Catalan(n-1) binary trees (Goodman 1996's objective).
    gen = torch.Generator().manual_seed(0)
    for n in (2, 3, 5, 6):
        marg = torch.rand(n + 2, n + 2, generator=gen, dtype=torch.float64)
        spans = mbr_spans(marg, n)

        def gain(tree):
            return sum(float(marg[i, j - i]) for i, j in tree)

        best = max(gain(t) for t in _bracketings(0, n))
        assert len(spans) == n - 1 and (0, n) in spans
        assert gain(spans) == pytest.approx(best, abs=1e-12)
    assert mbr_spans(torch.zeros(2, 2), 1) == []
