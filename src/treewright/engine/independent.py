"""The inside pass for binary rules whose two children are chosen independently given the parent.

Liu, Yang, Kim & Tu 2023, "Simple Hardware-Efficient PCFGs with Independent Left and Right
Productions": the binary rule probability factors as

    p(A -> B C) = p(B | A, left) * p(C | A, right),

one distribution over the S = NT + T child symbols for each parent and side. (This form is
written here from memory of the paper; the kernel below is this project's.) The inside score
of a nonterminal A over span (i, j) is then

    beta(i, j, A) = sum_k [sum_B p(B | A, left) beta(i, k, B)] [sum_C p(C | A, right) beta(k, j, C)]
                  = sum_k L(i, k, A) R(k, j, A),

so each cell is projected once per role onto the NT parents (L = cell @ left^T, R = cell @
right^T, one matrix product over symbols per cell and role), and a split point costs NT
multiplications. A sentence costs O(n^2 S NT) in products and O(n^3 NT) in split sums, instead
of O(n^3 S^2 NT) for dense rules. It is the low-rank pass of `engine.lowrank` with the rank
axis equal to the parent axis and the parent matrix U the identity, which this kernel skips.

The cells use the scaled probabilities of `engine.inside` (each cell divided by its maximum,
the log of which is kept as a scale that the gradient treats as a constant), so the pass is
safe in float32 and float64 alike. The charts hold the projections of the cells: the
left-role projections indexed by start and the right-role projections by end, so that all left
children of one width, and all right children, are one strided slice each. The backward (the
outside pass) is written by hand, as in `engine.lowrank`.

Shapes: B sentences, N longest length, NT nonterminals, T preterminals, S = NT + T,
P = N - w + 1 spans of width w, K = w - 1 splits.
"""

from __future__ import annotations

import torch
from torch import Tensor

from treewright.engine.inside import CHUNK_BYTES, prepare_inputs, word_scales

NEG_INF = float("-inf")


def _span_chunk(floats_per_span: int) -> int:
    """Spans per chunk so that a chunk's (spans, B, K, NT) temporary fits in a core's L2."""
    return max(1, CHUNK_BYTES // (4 * floats_per_span))


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
    root, terminal, lengths, nt_terminal = prepare_inputs(root, terminal, lengths, nt_terminal)
    return _Independent.apply(root, left, right, terminal, nt_terminal, span_pot, lengths)


class _Independent(torch.autograd.Function):
    @staticmethod
    def forward(ctx, root, left, right, terminal, nt_terminal, span_pot, lengths):
        with torch.no_grad():
            state = _inside(root, left, right, terminal, nt_terminal, span_pot, lengths)
        ctx.state = state
        ctx.shapes = (nt_terminal is not None, span_pot is not None)
        return state["logz"]

    @staticmethod
    def backward(ctx, grad_logz):
        state, (nt_emits, has_pot) = ctx.state, ctx.shapes
        ctx.state = None
        need = ctx.needs_input_grad  # the rule and word gradients only when asked for
        with torch.no_grad():
            grads = _outside(state, grad_logz, nt_emits, has_pot,
                             need_rules=any(need[1:3]), need_words=need[3])
        return grads + (None,)


def _inside(root, left, right, terminal, nt_terminal, span_pot, lengths) -> dict:
    B, N, T = terminal.shape
    NT = left.shape[0]
    # Child-major probabilities, (S, NT): column A is p(. | A, side).
    V, W = left.exp().t().contiguous(), right.exp().t().contiguous()
    # One scale per word, shared by its preterminal and nonterminal vectors.
    word_scale = word_scales(terminal, nt_terminal)                   # (B, N)
    shift = word_scale.nan_to_num(neginf=0.0).unsqueeze(-1)
    words = (terminal - shift).exp().transpose(0, 1).contiguous()    # (N, B, T)
    nts = None if nt_terminal is None else \
        (nt_terminal - shift).exp().transpose(0, 1).contiguous()      # (N, B, NT)

    # Parent projections: left role by start, [i, b, width] = L(i, i+width, .); right role by
    # end, [j, b, N-width] = R(j-width, j, .). Only written cells are ever read: no zero fill.
    left_proj = terminal.new_empty(N + 1, B, N + 1, NT)
    right_proj = terminal.new_empty(N + 1, B, N + 1, NT)
    scale_start = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    scale_end = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    one_l = words @ V[NT:]                                            # (N, B, NT)
    one_r = words @ W[NT:]
    if nts is not None:
        one_l += nts @ V[:NT]
        one_r += nts @ W[:NT]
    left_proj[0:N, :, 1] = one_l
    right_proj[1:N + 1, :, N - 1] = one_r
    scale_start[0:N, :, 1] = word_scale.t()
    scale_end[1:N + 1, :, N - 1] = word_scale.t()

    # Every width's cells in one buffer, rows [offset[w], offset[w+1]) for width w, so that the
    # backward takes the rule gradients in one product.
    offsets = [0, 0, 0]
    for width in range(2, N + 1):
        offsets.append(offsets[-1] + (N - width + 1) * B)
    cells_all = terminal.new_empty(offsets[-1], NT)
    vw = torch.cat([V[:NT], W[:NT]], 1)            # (NT, 2 NT): both roles in one product
    weights, peaks = [None, None], [None, None]
    top_cells = terminal.new_zeros(N + 1, B, NT)   # cell (0, width), for the root
    top_scales = terminal.new_full((N + 1, B), NEG_INF)
    if nts is not None:
        top_cells[1] = nts[0]
        top_scales[1] = word_scale[:, 0]
    for width in range(2, N + 1):
        P, K = N - width + 1, width - 1
        pair = scale_start[0:P, :, 1:width] + scale_end[width:N + 1, :, N - width + 1:N]
        top = pair.amax(-1).nan_to_num_(neginf=0.0)                   # (P, B)
        weight = (pair - top.unsqueeze(-1)).exp_()                    # (P, B, K)
        rows = slice(offsets[width], offsets[width + 1])
        cells = cells_all[rows].view(P, B, NT)
        step = _span_chunk(B * K * NT)
        for p0 in range(0, P, step):  # chunks of spans, so that each product stays in cache
            p1 = min(P, p0 + step)
            pairs = (left_proj[p0:p1, :, 1:width]
                     * right_proj[width + p0:width + p1, :, N - width + 1:N])  # (p, B, K, NT)
            M = (p1 - p0) * B
            torch.bmm(weight[p0:p1].reshape(M, 1, K), pairs.view(M, K, NT),
                      out=cells[p0:p1].view(M, 1, NT))
        peak = cells.amax(-1)                                         # (P, B)
        cells.div_(peak.unsqueeze(-1)).nan_to_num_(nan=0.0)           # a dead span stays 0
        scale = top + peak.log()                                      # log 0 = -inf: dead
        if span_pot is not None:
            scale = scale + span_pot[:, 0:P, width].t()
        proj = cells @ vw                                             # (P, B, 2 NT)
        left_proj[0:P, :, width] = proj[..., :NT]
        right_proj[width:N + 1, :, N - width] = proj[..., NT:]
        scale_start[0:P, :, width] = scale
        scale_end[width:N + 1, :, N - width] = scale
        top_cells[width] = cells[0]
        top_scales[width] = scale[0]
        weights.append(weight)
        peaks.append(peak)
    idx = torch.arange(B)
    tops, top_scale = top_cells[lengths, idx], top_scales[lengths, idx]  # (B, NT), (B,)
    pi = root.exp()
    total = (pi * tops).sum(-1)
    ok = (total > 0) & torch.isfinite(top_scale)
    logz = torch.where(ok, total.log() + top_scale, torch.full_like(total, NEG_INF))
    return {"logz": logz, "V": V, "W": W, "words": words, "nts": nts,
            "left_proj": left_proj, "right_proj": right_proj, "cells": cells_all,
            "offsets": offsets, "vw": vw, "weights": weights, "peaks": peaks,
            "pi": pi, "tops": tops, "total": total, "ok": ok, "lengths": lengths}


def _outside(st: dict, grad_logz: Tensor, nt_emits: bool, has_pot: bool,
             need_rules: bool = True, need_words: bool = True):
    """Adjoints from the widest span down; see `engine.inside._outside` for the conventions.

    The left and right rule gradients are None unless `need_rules`, the preterminal gradient
    None unless `need_words` (span posteriors alone need neither)."""
    V, W, words = st["V"], st["W"], st["words"]
    N, B, T = words.shape
    NT = V.shape[1]
    lengths, ok, total, pi = st["lengths"], st["ok"], st["total"], st["pi"]
    g_root = torch.where(ok, grad_logz / torch.where(ok, total, torch.ones_like(total)),
                         torch.zeros_like(total))                     # (B,)
    grad_root = pi * st["tops"] * g_root[:, None]
    adj_top = words.new_zeros(N + 1, B, NT)                           # adjoint of cell (0, w)
    adj_top[lengths, torch.arange(B)] = pi * g_root[:, None]
    # Only the cells of the chart's triangle are ever read or written, so only they are zeroed.
    adj_left = torch.empty_like(st["left_proj"])
    adj_right = torch.empty_like(st["right_proj"])
    for width in range(1, N + 1):
        adj_left[0:N + 1 - width, :, width].zero_()
        adj_right[width:N + 1, :, N - width].zero_()
    grad_V, grad_W = torch.zeros_like(V), torch.zeros_like(W)         # (S, NT)
    grad_pot = words.new_zeros(B, N + 1, N + 1) if has_pot else None
    left_proj, right_proj = st["left_proj"], st["right_proj"]
    offsets, vw = st["offsets"], st["vw"]
    # Per-width adjoints of the projections (left role, right role), in the row layout of the
    # forward's cell buffer; the rule gradients of widths >= 2 are then one product.
    adj_proj_all = words.new_empty(offsets[-1], 2 * NT)
    for width in range(N, 1, -1):
        P = N - width + 1
        rows = slice(offsets[width], offsets[width + 1])
        cells = st["cells"][rows].view(P, B, NT)
        weight, peak = st["weights"][width], st["peaks"][width]
        a_lr = adj_proj_all[rows].view(P, B, 2 * NT)
        a_lr[..., :NT] = adj_left[0:P, :, width]
        a_lr[..., NT:] = adj_right[width:N + 1, :, N - width]
        adj = a_lr @ vw.t()                                           # (P, B, NT)
        adj[0] += adj_top[width]
        if grad_pot is not None:
            grad_pot[:, 0:P, width] = (adj * cells).sum(-1).t()
        # d/d (unscaled sum over splits) = adjoint of the scaled cell / peak.
        g = adj.div_(peak.unsqueeze(-1)).nan_to_num_(nan=0.0)        # (P, B, NT)
        step = _span_chunk(B * (width - 1) * NT)
        for p0 in range(0, P, step):
            p1 = min(P, p0 + step)
            # One temporary serves both children: weight x span adjoint, (p1-p0, B, K, NT).
            g_split = g[p0:p1].unsqueeze(2) * weight[p0:p1].unsqueeze(-1)
            ends = slice(width + p0, width + p1)
            adj_left[p0:p1, :, 1:width].addcmul_(g_split, right_proj[ends, :, N - width + 1:N])
            adj_right[ends, :, N - width + 1:N].addcmul_(g_split, left_proj[p0:p1, :, 1:width])
    if offsets[-1] and need_rules:
        grad_vw = st["cells"].t() @ adj_proj_all                      # (NT, 2 NT)
        grad_V[:NT] += grad_vw[:, :NT]
        grad_W[:NT] += grad_vw[:, NT:]
    # Width one.
    a_l = adj_left[0:N, :, 1].reshape(N * B, NT)
    a_r = adj_right[1:N + 1, :, N - 1].reshape(N * B, NT)
    flat = words.view(N * B, T)
    if need_rules:
        grad_V[NT:] += flat.t() @ a_l
        grad_W[NT:] += flat.t() @ a_r
    grad_terminal = None
    if need_words:
        adj_words = (a_l @ V[NT:].t() + a_r @ W[NT:].t()).view(N, B, T)
        grad_terminal = (adj_words * words).transpose(0, 1)
    grad_nt_terminal = None
    if nt_emits:
        nts = st["nts"]
        flat = nts.view(N * B, NT)
        if need_rules:
            grad_V[:NT] += flat.t() @ a_l
            grad_W[:NT] += flat.t() @ a_r
        adj_nts = (a_l @ V[:NT].t() + a_r @ W[:NT].t()).view(N, B, NT)
        adj_nts[0] += adj_top[1]
        grad_nt_terminal = (adj_nts * nts).transpose(0, 1)
    if not need_rules:
        return grad_root, None, None, grad_terminal, grad_nt_terminal, grad_pot
    # d/d log p = p * d/dp, back in the parent-major (NT, S) layout of the arguments.
    return (grad_root, (grad_V * V).t(), (grad_W * W).t(), grad_terminal, grad_nt_terminal,
            grad_pot)
