"""The inside pass in the max semiring (Viterbi), with back-pointers.

Same chart and child blocks as `engine.inside` (nonterminal pairs, a preterminal on the right,
on the left, both), but in log space with max in place of sum, so each block keeps its best split
and children. Decoding does not need the matrix-product speed of the sum semiring; it needs the
exact best tree.

Shapes: B sentences, N longest length, P = N - w + 1 spans of width w, NT nonterminals,
T preterminals. Child indices follow the engine's layout: c < NT nonterminal, else preterminal
c - NT.
"""

from __future__ import annotations

import torch
from torch import Tensor

NEG_INF = float("-inf")


def _best_children(scores: Tensor, rules: Tensor) -> tuple[Tensor, Tensor]:
    """max over (B, C) of rules[A, B, C] + scores[..., B, C].

    scores: (B, P, X, Y), rules: (NT, X, Y) -> values (B, P, NT), flat argmax (B, P, NT).
    """
    Bt, P, X, Y = scores.shape
    total = scores.reshape(Bt, P, 1, X * Y) + rules.reshape(1, 1, -1, X * Y)
    return total.max(-1)


def viterbi(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
            nt_terminal: Tensor | None = None, span_pot: Tensor | None = None
            ) -> list[tuple[float, list[tuple[int, int, int]]] | None]:
    """The most probable tree of each sentence (arguments as in `engine.inside.log_partition`;
    here `span_pot` may also be given per nonterminal, (B, N+1, N+1, NT), a log potential added
    to each nonterminal's score over each span of width >= 2).

    Returns per sentence (log-probability, spans) with spans (start, end, symbol) in pre-order,
    one-word spans included, or None when the sentence has no parse.
    """
    B, N, T = terminal.shape
    if binary.dim() != 3:
        raise ValueError("viterbi takes one grammar for the batch, binary (NT, S, S); rules "
                         "per sentence are supported by log_partition only")
    NT = binary.shape[0]
    if root.dim() == 1:
        root = root.expand(B, -1)
    lengths = torch.as_tensor(lengths, dtype=torch.long)
    with torch.no_grad():
        r_nn = binary[:, :NT, :NT]
        r_np = binary[:, :NT, NT:]
        r_pn = binary[:, NT:, :NT]
        r_pp = binary[:, NT:, NT:]
        min_w = 1 if nt_terminal is not None else 2
        term = terminal                                            # (B, N, T)
        # cells[w]: (B, N - w + 1, NT) best log score of each nonterminal over each span.
        cells = {1: nt_terminal if nt_terminal is not None
                 else terminal.new_full((B, N, NT), NEG_INF)}
        # back[w]: (split u, left child, right child), each (B, P, NT) int64
        back: dict[int, tuple[Tensor, Tensor, Tensor]] = {}
        for w in range(2, N + 1):
            P = N - w + 1
            options = []   # (values, split, left child, right child), each (B, P, NT)
            lo, hi = min_w, w - min_w
            if hi >= lo:
                pairs = torch.stack([cells[u][:, 0:P, :, None] + cells[w - u][:, u:u + P, None, :]
                                     for u in range(lo, hi + 1)], 2)   # (B, P, K, NT, NT)
                pair_best, pair_split = pairs.max(2)                    # (B, P, NT, NT)
                values, flat = _best_children(pair_best, r_nn)
                left, right = flat // NT, flat % NT
                split = torch.gather(pair_split.reshape(B, P, NT * NT), 2, flat) + lo
                options.append((values, split, left, right))
            # Blocks with a preterminal child exist only when there are preterminals: a general
            # CNF grammar may have none (T = 0), and a max over an empty block is an error.
            if w - 1 >= min_w and T:
                scores = cells[w - 1][:, 0:P, :, None] + term[:, w - 1:N, None, :]
                values, flat = _best_children(scores, r_np)
                options.append((values, torch.full_like(flat, w - 1), flat // T, flat % T + NT))
                scores = term[:, 0:P, :, None] + cells[w - 1][:, 1:1 + P, None, :]
                values, flat = _best_children(scores, r_pn)
                options.append((values, torch.ones_like(flat), flat // NT + NT, flat % NT))
            if w == 2 and T:
                scores = term[:, 0:P, :, None] + term[:, 1:1 + P, None, :]
                values, flat = _best_children(scores, r_pp)
                options.append((values, torch.ones_like(flat), flat // T + NT, flat % T + NT))
            if not options:  # no block fits this width (no rules can build such a span)
                none = terminal.new_full((B, P, NT), NEG_INF)
                zero = torch.zeros(B, P, NT, dtype=torch.long)
                options.append((none, zero, zero, zero))
            values = torch.stack([o[0] for o in options])               # (K, B, P, NT)
            best, which = values.max(0)
            pick = which.unsqueeze(0)
            split, left, right = (torch.stack([o[k] for o in options]).gather(0, pick)[0]
                                  for k in (1, 2, 3))
            if span_pot is not None:
                best = best + (span_pot[:, 0:P, w] if span_pot.dim() == 4
                               else span_pot[:, 0:P, w, None])
            cells[w] = best
            back[w] = (split, left, right)

    out: list[tuple[float, list[tuple[int, int, int]]] | None] = []
    for b in range(B):
        n = int(lengths[b])
        if n == 1:
            tops = cells[1][b, 0] if nt_terminal is not None else None
            if tops is None:
                out.append(None)
                continue
        else:
            tops = cells[n][b, 0]
        total = root[b] + tops
        score, sym = total.max(0)
        if not torch.isfinite(score):
            out.append(None)
            continue
        out.append((float(score), _backtrace(back, b, n, int(sym), NT)))
    return out


def _backtrace(back, b: int, n: int, top: int, NT: int) -> list[tuple[int, int, int]]:
    spans = []
    stack = [(0, n, top)]
    while stack:
        i, j, sym = stack.pop()
        spans.append((i, j, sym))
        if j - i == 1:
            continue
        split, left, right = back[j - i]
        u = int(split[b, i, sym])
        stack.append((i + u, j, int(right[b, i, sym])))
        stack.append((i, i + u, int(left[b, i, sym])))
    return spans
