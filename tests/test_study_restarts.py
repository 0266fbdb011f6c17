"""Tree averaging (`decode.tree_average`) and the agreement score of scripts/study_restarts.py,
against brute force."""

from __future__ import annotations

import importlib.util
import random
import sys
from pathlib import Path

import pytest

from treewright.decode import tree_average

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("study_restarts",
                                               REPO / "scripts" / "study_restarts.py")
study = importlib.util.module_from_spec(_spec)
sys.modules["study_restarts"] = study
_spec.loader.exec_module(study)


def _binary_trees(i: int, j: int):
    """Every binary bracketing of words i..j as a set of spans of width >= 2 (brute force)."""
    if j - i == 1:
        yield frozenset()
        return
    for k in range(i + 1, j):
        for left in _binary_trees(i, k):
            for right in _binary_trees(k, j):
                yield left | right | {(i, j)}


def _random_tree(rng: random.Random, i: int, j: int) -> set:
    if j - i == 1:
        return set()
    k = rng.randrange(i + 1, j)
    return _random_tree(rng, i, k) | _random_tree(rng, k, j) | {(i, j)}


def test_tree_average_maximizes_summed_f1_over_every_binary_tree():
    # Reference: enumeration of all binary trees (Catalan(n - 1) of them) and their summed
    # sentence F1 against the input trees, the objective of Shayegh et al. 2024.
    rng = random.Random(4)
    for n in (3, 5, 6, 7):
        for _ in range(5):
            trees = [sorted(_random_tree(rng, 0, n)) for _ in range(4)]
            got = set(tree_average(trees, n))

            def summed(tree):
                return sum(study.pair_f1([sorted(tree)], [t], [n]) for t in trees)
            best = max(summed(t) for t in _binary_trees(0, n))
            assert len(got) == n - 1
            assert summed(got) == pytest.approx(best)


def test_pair_f1_by_hand():
    # Hand-worked: n = 4; a has inner spans {(0,2),(0,3)}, b has {(0,2),(2,4)} -> F1 1/2;
    # a second sentence of 2 words has no counted span and is skipped (common practice).
    a = [[(0, 4), (0, 3), (0, 2)], [(0, 2)]]
    b = [[(0, 4), (0, 2), (2, 4)], [(0, 2)]]
    assert study.pair_f1(a, b, [4, 2]) == pytest.approx(0.5)
