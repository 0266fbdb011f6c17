"""How much memory one inside-outside call needs, so that callers can size batches to a budget.

The count follows `engine.inside`: the chart and its adjoint, the backward's copy of the chart
laid out by end and its two per-position adjoint buffers, five arrays of (N+1, B, N+1, NT') in
all; the split weights the backward reuses, about N^3/6 numbers per sentence; the per-position
rule matrices with their gradients, 4 x (N, B, NT', NT'); and the preterminal-pair matrices with
their gradients, 2 x (N, B, T, NT'), where NT' is NT padded to a multiple of 8. The split sums
and weighted children are made in chunks of about `CHUNK_BYTES` each, a fixed cost. Temporaries
and the allocator's slack are covered by a factor of 2, checked against measured peaks by
tests/test_train_memory.py.
"""

from __future__ import annotations

from treewright.engine.inside import CHUNK_BYTES

SLACK = 2.0
CHUNKS_IN_FLIGHT = 6  # backward: weighted children, split sums, their adjoints, two products


def inside_outside_bytes(batch: int, length: int, nonterminals: int, preterminals: int,
                         itemsize: int = 4, rules_per_sentence: bool = False,
                         rank: int | None = None) -> int:
    """Estimated peak bytes of `log_partition` forward and backward for `batch` sentences padded
    to `length` words. With `rules_per_sentence` (compound grammars) each sentence also has its
    own rule tensor, probabilities and gradient (3 x NT x S^2) and padded rule blocks with their
    gradients (2 x (NT'^3 + 2 T NT'^2 + T^2 NT')). With `rank`, the estimate is that of
    `engine.lowrank` instead (see `_lowrank_floats`)."""
    if rank is not None:
        per_sentence, fixed = _lowrank_floats(length, nonterminals, preterminals, rank)
        return int(SLACK * (itemsize * (batch * per_sentence + fixed)
                            + CHUNKS_IN_FLIGHT * CHUNK_BYTES))
    nt = -(-nonterminals // 8) * 8
    n1 = length + 1
    charts = 5 * n1 * n1 * nt
    weights = length ** 3 // 6 + length * length
    edge_mats = 4 * length * nt * nt
    pair_mats = 2 * length * preterminals * nt
    terminals = 3 * length * preterminals
    per_sentence = charts + weights + edge_mats + pair_mats + terminals
    if rules_per_sentence:
        s = nonterminals + preterminals
        t = preterminals
        per_sentence += 3 * nonterminals * s * s + 2 * (nt ** 3 + 2 * t * nt * nt + t * t * nt)
    return int(SLACK * (itemsize * batch * per_sentence + CHUNKS_IN_FLIGHT * CHUNK_BYTES))


def _lowrank_floats(length: int, nonterminals: int, preterminals: int, rank: int
                    ) -> tuple[int, int]:
    """(numbers per sentence, numbers per call) of `engine.lowrank` forward and backward.

    Per sentence: the two projection charts and their adjoints, 4 x (N+1)^2 x R; every span's
    cell and rank sum with their adjoints (the backward also keeps both projections'
    adjoints), about N^2/2 x (2 NT + 3 R); the split weights, N^3/6; the words, 3 N T. Per
    call: the factors, their exponentials and gradients, 8 x S x R.
    """
    n1 = length + 1
    spans = length * length // 2 + 1
    per_sentence = (4 * n1 * n1 * rank + spans * (2 * nonterminals + 3 * rank)
                    + length ** 3 // 6 + 3 * length * preterminals)
    return per_sentence, 8 * (nonterminals + preterminals) * rank
