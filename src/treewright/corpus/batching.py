"""Seeded train/dev/test splits and length-bucketed batches, as lists of sentence indices.

Nothing here needs torch: callers turn an index list into tensors themselves.
"""

from __future__ import annotations

import random
from dataclasses import dataclass
from typing import Callable, Sequence

# Sentences per call of the decoders over a rule tensor (`decode.decode`, `decode.consensus`,
# and so `parse`, `report` and `export`): 32 ran mbr and max-rule-product 5-20% faster than 16
# (`scripts/bench_parse_speed.py`, per-batch work dominating at demo sizes), 64 no faster. The
# memory budget (`treewright.budget`) splits a call further. Factored rules and the
# lexicalized model decode 16 at a time.
DECODE_BATCH = 32


@dataclass
class Split:
    """Sentence indices of each part, each list in increasing order (file order)."""
    train: list[int]
    dev: list[int]
    test: list[int]


def split_indices(n: int, dev: float = 0.1, test: float = 0.1, seed: int = 0) -> Split:
    """Split `n` sentences at random into train/dev/test; the same seed gives the same split.

    dev and test are fractions of `n` (rounded to the nearest whole sentence); train gets
    the rest. Every index lands in exactly one part.
    """
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n}")
    if not (0 <= dev and 0 <= test and dev + test <= 1):
        raise ValueError(f"dev and test must be >= 0 with dev + test <= 1, got {dev}, {test}")
    order = list(range(n))
    random.Random(seed).shuffle(order)
    n_dev, n_test = round(n * dev), round(n * test)
    n_test = min(n_test, n - n_dev)
    return Split(train=sorted(order[n_dev + n_test:]), dev=sorted(order[:n_dev]),
                 test=sorted(order[n_dev:n_dev + n_test]))


def cubic_cost(length: int) -> int:
    """The inside algorithm's work on one sentence grows as n^3 (common practice)."""
    return length ** 3


def length_batches(lengths: Sequence[int], max_sentences: int | None = None,
                   max_cost: float | None = None, cost: Callable[[int], float] = cubic_cost,
                   shuffle: bool = False, seed: int = 0) -> list[list[int]]:
    """Group sentence indices into batches of similar length.

    Sentences are sorted by length (ties by index) and cut greedily into batches of at most
    `max_sentences` and, when `max_cost` is set, of padded cost `len(batch) * cost(longest)` at
    most `max_cost`. A sentence costlier than the budget alone gets a batch of its own, so every
    index appears in exactly one batch. `shuffle` reorders the batches (not their contents) with
    `seed`. At least one of the two limits is required.
    """
    if max_sentences is None and max_cost is None:
        raise ValueError("give max_sentences, max_cost or both")
    if max_sentences is not None and max_sentences < 1:
        raise ValueError(f"max_sentences must be >= 1, got {max_sentences}")
    if max_cost is not None and max_cost <= 0:
        raise ValueError(f"max_cost must be > 0, got {max_cost}")
    batches: list[list[int]] = []
    batch: list[int] = []
    for index in sorted(range(len(lengths)), key=lambda i: (lengths[i], i)):
        # Sorted ascending, so the newcomer is the batch's longest sentence.
        full = max_sentences is not None and len(batch) >= max_sentences
        over = max_cost is not None and (len(batch) + 1) * cost(lengths[index]) > max_cost
        if batch and (full or over):
            batches.append(batch)
            batch = []
        batch.append(index)
    if batch:
        batches.append(batch)
    if shuffle:
        random.Random(seed).shuffle(batches)
    return batches
