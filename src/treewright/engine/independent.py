"""The inside pass for binary rules whose two children are chosen independently given the parent.

Liu, Yang, Kim & Tu 2023, "Simple Hardware-Efficient PCFGs with Independent Left and Right
Productions": the binary rule probability factors as

    p(A -> B C) = p(B | A, left) * p(C | A, right),

one distribution over the S = NT + T child symbols for each parent and side. (This form is
written here from memory of the paper; the kernel is this project's.) The inside score of a
nonterminal A over span (i, j) is then

    beta(i, j, A) = sum_k [sum_B p(B | A, left) beta(i, k, B)] [sum_C p(C | A, right) beta(k, j, C)]
                  = sum_k L(i, k, A) R(k, j, A),

so each cell is projected once per role onto the NT parents (L = cell @ left^T, R = cell @
right^T, one matrix product over symbols per cell and role), and a split point costs NT
multiplications. A sentence costs O(n^2 S NT) in products and O(n^3 NT) in split sums, instead
of O(n^3 S^2 NT) for dense rules. That is the low-rank pass of `engine.lowrank` with the rank
axis equal to the parent axis and the parent matrix U the identity, so this module runs that
pass (scaled cells, hand-written outside pass) with U left out.

Shapes: B sentences, N longest length, NT nonterminals, T preterminals, S = NT + T.
"""

from __future__ import annotations

from torch import Tensor

from treewright.engine.lowrank import lowrank_log_partition


def independent_dense_binary(left: Tensor, right: Tensor) -> Tensor:
    """The (NT, S, S) rule log-probabilities log p(B | A, left) + log p(C | A, right)."""
    return left[:, :, None] + right[:, None, :]


def independent_log_partition(root: Tensor, left: Tensor, right: Tensor, terminal: Tensor,
                              lengths: Tensor, nt_terminal: Tensor | None = None,
                              span_pot: Tensor | None = None) -> Tensor:
    """log Z per sentence, (B,), differentiable with respect to every tensor argument.

    root          (NT,) or (B, NT)  log p(top symbol)
    left, right   (NT, S)           log p(B | A, left), log p(C | A, right): each row a
                                    distribution over the S child symbols (nonterminals first)
    terminal, lengths, nt_terminal, span_pot: as in `engine.inside.log_partition`.
    Sentences with no parse get -inf (and zero gradients).
    """
    # The low-rank factors V and W are (S, R) with R = NT: child-major, column A for parent A
    # (transposed views; the pass's products read them as they are).
    return lowrank_log_partition(root, None, left.t(), right.t(), terminal, lengths,
                                 nt_terminal, span_pot)
