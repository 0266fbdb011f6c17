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
                         itemsize: int = 4, rules_per_sentence: bool = False) -> int:
    """Estimated peak bytes of `log_partition` forward and backward for `batch` sentences padded
    to `length` words. With `rules_per_sentence` (compound grammars) each sentence also has its
    own rule tensor, probabilities and gradient (3 x NT x S^2) and padded rule blocks with their
    gradients (2 x (NT'^3 + 2 T NT'^2 + T^2 NT'))."""
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
