"""How much memory one inside-outside call needs, so that callers can size batches to a budget.

The count follows `engine.inside`: the two chart copies and their two adjoint copies, each
(N+1, B, N+1, NT'); what the backward reuses from the forward: the split sums, about N^2/2
matrices of NT' x NT' per sentence, and the weighted left children, about N^3/6 vectors of NT';
and the per-position rule matrices with their gradients, 4 x (N, B, NT', NT'), where
NT' is NT padded to a multiple of 8. Temporaries and the allocator's slack are covered by a
factor of 2, checked against measured peaks by tests/test_train_memory.py.
"""

from __future__ import annotations

SLACK = 2.0


def inside_outside_bytes(batch: int, length: int, nonterminals: int, preterminals: int,
                         itemsize: int = 4) -> int:
    """Estimated peak bytes of `log_partition` forward and backward for `batch` sentences padded
    to `length` words."""
    nt = -(-nonterminals // 8) * 8
    n1 = length + 1
    charts = 4 * n1 * n1 * nt
    split_sums = (length * length // 2 + 1) * nt * nt
    left_children = (length ** 3 // 6 + 1) * nt
    edge_mats = 4 * length * nt * nt
    terminals = 3 * length * preterminals
    return int(SLACK * itemsize * batch * (charts + split_sums + left_children + edge_mats
                                                + terminals))
