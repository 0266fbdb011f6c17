"""Seeded splits and length-bucketed batches, checked by brute force."""

from __future__ import annotations

import random

import pytest

from treewright.corpus import cubic_cost, length_batches, split_indices


@pytest.mark.parametrize("n", [0, 1, 7, 100, 1001])
def test_split_is_a_seeded_partition(n):
    split = split_indices(n, dev=0.1, test=0.2, seed=3)
    parts = split.train + split.dev + split.test
    assert sorted(parts) == list(range(n))  # every index exactly once
    assert (len(split.dev), len(split.test)) == (round(n * 0.1), round(n * 0.2))
    assert split == split_indices(n, dev=0.1, test=0.2, seed=3)  # deterministic
    for part in (split.train, split.dev, split.test):
        assert part == sorted(part)


def test_split_depends_on_the_seed():
    # Reference: the standard library's shuffle with the same seed picks the same dev set.
    order = list(range(50))
    random.Random(11).shuffle(order)
    assert split_indices(50, dev=0.2, test=0.0, seed=11).dev == sorted(order[:10])
    assert split_indices(50, seed=1) != split_indices(50, seed=2)


def test_batches_respect_both_limits_and_group_similar_lengths():
    rng = random.Random(5)
    lengths = [rng.randint(1, 40) for _ in range(300)]
    budget = 4 * 30 ** 3
    batches = length_batches(lengths, max_sentences=16, max_cost=budget)
    assert sorted(i for b in batches for i in b) == list(range(300))
    for batch in batches:
        longest = max(lengths[i] for i in batch)
        assert len(batch) <= 16
        assert len(batch) == 1 or len(batch) * cubic_cost(longest) <= budget
    # Brute force: read in order, the batches run through the lengths sorted ascending, so
    # no batch's range of lengths overlaps another's except at a shared boundary length.
    flat = [lengths[i] for b in batches for i in b]
    assert flat == sorted(lengths)


def test_an_oversized_sentence_gets_its_own_batch():
    batches = length_batches([3, 50, 2], max_cost=1000)
    # 50^3 is far over the budget, 2 * 3^3 = 54 fits (hand-worked).
    assert batches == [[2, 0], [1]]


def test_shuffle_keeps_the_batches():
    lengths = list(range(1, 41))
    plain = length_batches(lengths, max_sentences=4)
    mixed = length_batches(lengths, max_sentences=4, shuffle=True, seed=9)
    assert sorted(map(tuple, mixed)) == sorted(map(tuple, plain)) and mixed != plain
    assert mixed == length_batches(lengths, max_sentences=4, shuffle=True, seed=9)


def test_batching_needs_a_limit():
    with pytest.raises(ValueError):
        length_batches([1, 2])
