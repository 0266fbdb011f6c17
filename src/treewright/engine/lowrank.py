"""The inside pass for low-rank binary rules, for grammars with hundreds of symbols.

Yang, Zhao & Tu 2021, "PCFGs Can Do Better: Inducing Probabilistic Context-Free Grammars with
Many Symbols" (TD-PCFG): the rule tensor is a sum of R rank-one terms,

    p(A -> B C) = sum_r U[A, r] V[B, r] W[C, r],

with each row of U a distribution over r and each column of V and W a distribution over the
child symbols (all S = NT + T of them), so every p(A -> . .) sums to one. The inside score of a
span then never needs the (NT, S, S) tensor: each cell is projected once onto the rank space
(left role V^T x, right role W^T x), a split point costs R multiplications, and a span's
nonterminal scores are U times the rank vector summed over its splits. Cost per sentence is
O(n^3 R + n^2 R (NT + S)) instead of O(n^3 S^2 + n^2 S^2 NT).

The cells use the scaled probabilities of `engine.inside` (each cell divided by its maximum,
the log of which is kept as a scale that the gradient treats as a constant). The chart holds
the rank projections of the cells, not the cells: both roles of a cell in one row, the rows of
one width together, so that a width's projections are one matrix product written in place.
The split sums, where each span reads its children's rows, are a compiled loop (`_kernels`).
The backward is written by hand: autograd over per-width slices spends its time zero-filling
and stacking, not multiplying.

Shapes: B sentences, N longest length, NT nonterminals, T preterminals, R rank, P = N - w + 1.
"""

from __future__ import annotations

import functools

import torch
from torch import Tensor

from treewright.engine.compiled import jit
from treewright.engine.inside import SpanTables, past_end, prepare_inputs, word_scales

NEG_INF = float("-inf")


@functools.cache
def _kernels():
    """The split sums of one width, and the adjoints of a width's cells gathered from their
    parents, compiled loops (numba, on first use, per dtype). For the sums each (span,
    sentence) row walks its K = width - 1 splits and adds, over the rank, the split's weight
    times the left child's left-role projection times the right child's right-role
    projection: no (spans, B, K, R) product is made and read again, as a product of whole
    tensors needs. `proj` (rows, 2R) holds both roles of every cell as
    `_inside` lays it out: cell (start i, width w) of sentence b at row rows[w] + i B + b, its
    left role in the first R columns and its right role in the last R."""
    @jit
    def split_sums(proj, rows, weight, out, width):  # pragma: no cover
        P, B, K = weight.shape
        R = proj.shape[1] // 2
        for p in range(P):
            for b in range(B):
                o = out[p, b]
                for r in range(R):
                    o[r] = 0.0
                for k in range(K):
                    wk = weight[p, b, k]
                    # The children: left (p, k + 1), right (p + k + 1, width - k - 1).
                    at_left = rows[1 + k] + p * B + b
                    at_right = rows[width - 1 - k] + (p + 1 + k) * B + b
                    left, right = proj[at_left], proj[at_right]
                    for r in range(R):
                        o[r] += wk * left[r] * right[R + r]

    @jit
    def child_adjoints(proj, rows, weight, wrows, g_rank, grows, adj, N, B, w):  # pragma: no cover
        """The adjoints of both roles of every cell of width w (all N - w + 1 starts, all
        B sentences), each row written once: the sum over the cell's parents (every wider
        span that has it as a child, whose rank adjoints `g_rank` are final) of the split's
        weight times the parent's rank adjoint times the sibling's projection in the other
        role. `weight` holds every width's split weights flat, width W's (start p, sentence
        b, split k) at wrows[W] + (p B + b) (W - 1) + k; `g_rank` the parents' rank adjoints
        in the cells' row order, width W's at grows[W] + p B + b."""
        R = proj.shape[1] // 2
        for i in range(N - w + 1):
            for b in range(B):
                out = adj[rows[w] + i * B + b]
                for r in range(2 * R):
                    out[r] = 0.0
                # The left child of (i, W), split w - 1; its sibling (i + w, W - w).
                for W in range(w + 1, N - i + 1):
                    wk = weight[wrows[W] + (i * B + b) * (W - 1) + w - 1]
                    if wk == 0.0:
                        continue
                    g = g_rank[grows[W] + i * B + b]
                    sib = proj[rows[W - w] + (i + w) * B + b]
                    for r in range(R):
                        out[r] += wk * g[r] * sib[R + r]
                # The right child of (p, W), p = i - (W - w), split W - w - 1; its sibling
                # (p, W - w).
                for W in range(w + 1, w + i + 1):
                    p = i - (W - w)
                    wk = weight[wrows[W] + (p * B + b) * (W - 1) + W - w - 1]
                    if wk == 0.0:
                        continue
                    g = g_rank[grows[W] + p * B + b]
                    sib = proj[rows[W - w] + p * B + b]
                    for r in range(R):
                        out[R + r] += wk * g[r] * sib[r]

    return split_sums, child_adjoints


def dense_binary(u: Tensor, v: Tensor, w: Tensor) -> Tensor:
    """The (NT, S, S) rule log-probabilities that log-space factors u, v, w imply."""
    return torch.logsumexp(u[:, None, None, :] + v[None, :, None, :] + w[None, None, :, :], -1)


def lowrank_log_partition(root: Tensor, u: Tensor | None, v: Tensor, w: Tensor, terminal: Tensor,
                          lengths: Tensor, nt_terminal: Tensor | None = None,
                          span_pot: Tensor | None = None) -> Tensor:
    """log Z per sentence, (B,), differentiable with respect to every tensor argument.

    root        (NT,) or (B, NT)  log p(top symbol)
    u           (NT, R) or None   log U, each row normalised over r; None: U is the identity
                                  (R = NT), the independent productions of `engine.independent`
    v, w        (S, R)            log V, log W, each column normalised over the S child symbols
                                  (nonterminals first, then preterminals)
    terminal, lengths, nt_terminal, span_pot: as in `engine.inside.log_partition`.
    Sentences with no parse get -inf (and zero gradients).
    """
    root, terminal, lengths, nt_terminal = prepare_inputs(root, terminal, lengths, nt_terminal)
    return _LowRank.apply(root, u, v, w, terminal, nt_terminal, span_pot, lengths)


def lowrank_label_marginals(root: Tensor, u: Tensor | None, v: Tensor, w: Tensor,
                            terminal: Tensor, lengths: Tensor,
                            nt_terminal: Tensor | None = None) -> tuple[Tensor, Tensor]:
    """log Z (B,) and every symbol's posterior marginal over every span, (B, N+1, N+1, NT + T)
    indexed [b, start, width, symbol] (preterminals at width one), for low-rank rules (`u`
    None: independent productions, as `engine.independent` passes them): what
    `engine.inside.span_tables` gives a decoder for dense rules, from one inside pass and one
    outside pass without the factor gradients. A cell's marginal is its adjoint times its
    scaled score (Eisner 2016); spans past a sentence's end and sentences with no parse are 0.
    """
    tables = lowrank_span_tables(root, u, v, w, terminal, lengths, nt_terminal, log_scores=False)
    return tables.logz, tables.marginals


def lowrank_span_tables(root: Tensor, u: Tensor | None, v: Tensor, w: Tensor, terminal: Tensor,
                        lengths: Tensor, nt_terminal: Tensor | None = None,
                        log_scores: bool = True) -> SpanTables:
    """`engine.inside.span_tables` for low-rank rules (arguments as in
    `lowrank_label_marginals`): log Z, the marginals and, with `log_scores`, every symbol's
    inside score over every span in the chart's scale (the cells this pass keeps, and the
    words) and its outside score, read off as marginal / scaled inside (the outside score over
    Z times e^scale, as `SpanTables` keeps it). No (NT, S, S) tensor is formed."""
    root, terminal, lengths, nt_terminal = prepare_inputs(root, terminal, lengths, nt_terminal)
    B, N, T = terminal.shape
    NT = root.shape[-1]
    with torch.no_grad():
        state = _inside(root, u, v, w, terminal, nt_terminal, None, lengths)
        marginals = terminal.new_zeros(B, N + 1, N + 1, NT + T)
        grads = _outside(state, torch.ones_like(state["logz"]), nt_terminal is not None, False,
                         need_factors=False, need_words=True, labels=marginals)
        marginals[:, :N, 1, NT:] = grads[4]
        if grads[5] is not None:
            marginals[:, :N, 1, :NT] = grads[5]
        if not log_scores:
            return SpanTables(state["logz"], marginals)
        inside = terminal.new_zeros(B, N + 1, N + 1, NT + T)
        scale = terminal.new_full((B, N + 1, N + 1), NEG_INF)
        inside[:, :N, 1, NT:] = state["words"].transpose(0, 1)
        if state["nts"] is not None:
            inside[:, :N, 1, :NT] = state["nts"].transpose(0, 1)
        scale[:, :N, 1] = state["word_scale"]
        offsets = state["offsets"]
        for width in range(2, N + 1):
            P = N - width + 1
            rows = slice(offsets[width], offsets[width + 1])
            inside[:, 0:P, width, :NT] = state["cells"][rows].view(P, B, NT).transpose(0, 1)
            scale[:, 0:P, width] = state["scale_start"][0:P, :, width].t()
        inside.masked_fill_(past_end(lengths, N)[..., None], 0.0)
        cells = inside[..., :NT]
        some = cells > 0
        outside = torch.where(some, marginals[..., :NT] / torch.where(some, cells, 1.0), 0.0)
    return SpanTables(state["logz"], marginals, inside, outside, scale)


class _LowRank(torch.autograd.Function):
    @staticmethod
    def forward(ctx, root, u, v, w, terminal, nt_terminal, span_pot, lengths):
        with torch.no_grad():
            state = _inside(root, u, v, w, terminal, nt_terminal, span_pot, lengths)
        ctx.state = state
        ctx.shapes = (nt_terminal is not None, span_pot is not None)
        return state["logz"]

    @staticmethod
    def backward(ctx, grad_logz):
        state, (nt_emits, has_pot) = ctx.state, ctx.shapes
        ctx.state = None
        need = ctx.needs_input_grad  # the factor and word gradients only when asked for
        with torch.no_grad():
            grads = _outside(state, grad_logz, nt_emits, has_pot,
                             need_factors=any(need[1:4]), need_words=need[4])
        return grads + (None,)


def _inside(root, u, v, w, terminal, nt_terminal, span_pot, lengths) -> dict:
    B, N, T = terminal.shape
    NT, R = root.shape[-1], v.shape[1]
    U = None if u is None else u.exp()                                # None: the identity
    V, W = v.exp(), w.exp()
    # One scale per word, shared by its preterminal and nonterminal vectors.
    word_scale = word_scales(terminal, nt_terminal)                   # (B, N)
    shift = word_scale.nan_to_num(neginf=0.0).unsqueeze(-1)
    words = (terminal - shift).exp().transpose(0, 1).contiguous()    # (N, B, T)
    nts = None if nt_terminal is None else \
        (nt_terminal - shift).exp().transpose(0, 1).contiguous()      # (N, B, NT)

    # Every width's cells and rank sums in one buffer each, rows [offset[w], offset[w+1]) for
    # width w >= 2, (start, sentence) within a width, so that the backward takes the factor
    # gradients in one product per factor.
    offsets = [0, 0, 0]
    for width in range(2, N + 1):
        offsets.append(offsets[-1] + (N - width + 1) * B)
    cells_all = terminal.new_empty(offsets[-1], NT)
    # Without U the rank sums are the raw cells, needed only until they are scaled.
    rank_sums_all = None if U is None else terminal.new_empty(offsets[-1], R)
    # Rank projections of every cell, both roles in one row: V^T cell, then W^T cell. Rows as
    # the cells', after N B rows for the words: cell (i, width) of sentence b at row
    # proj_rows[width] + i B + b. Each width's products write their rows in place, and the
    # backward's adjoints of them are rows of the cells' layout too.
    # Only written cells are ever read, so the projections need no zero fill.
    proj_rows = torch.tensor([0, 0] + [N * B + o for o in offsets[2:]])
    proj_all = terminal.new_empty(N * B + offsets[-1], 2 * R)
    scale_start = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    scale_end = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    vw = torch.cat([V[:NT], W[:NT]], 1)            # (NT, 2R): both roles in one product
    vw_words = torch.cat([V[NT:], W[NT:]], 1)      # (T, 2R)
    one = proj_all[:N * B]
    torch.mm(words.view(N * B, T), vw_words, out=one)
    if nts is not None:
        one.addmm_(nts.view(N * B, NT), vw)
    scale_start[0:N, :, 1] = word_scale.t()
    scale_end[1:N + 1, :, N - 1] = word_scale.t()
    weights, peaks = [None, None], [None, None]
    top_cells = terminal.new_zeros(N + 1, B, NT)   # cell (0, width), for the root
    top_scales = terminal.new_full((N + 1, B), NEG_INF)
    if nts is not None:
        top_cells[1] = nts[0]
        top_scales[1] = word_scale[:, 0]
    for width in range(2, N + 1):
        P = N - width + 1
        pair = scale_start[0:P, :, 1:width] + scale_end[width:N + 1, :, N - width + 1:N]
        top = pair.amax(-1).nan_to_num_(neginf=0.0)                   # (P, B)
        weight = (pair - top.unsqueeze(-1)).exp_()                    # (P, B, width - 1)
        rows = slice(offsets[width], offsets[width + 1])
        # Without U the sums are written straight into the cells and scaled there.
        rank_sums = (cells_all if U is None else rank_sums_all)[rows].view(P, B, R)
        _kernels()[0](proj_all.numpy(), proj_rows.numpy(), weight.numpy(), rank_sums.numpy(),
                      width)
        total = rank_sums if U is None else rank_sums @ U.t()         # (P, B, NT)
        peak = total.amax(-1)
        cells = torch.div(total, peak.unsqueeze(-1), out=cells_all[rows].view(P, B, NT))
        cells.nan_to_num_(nan=0.0)                                    # a dead span stays 0
        scale = top + peak.log()                                      # log 0 = -inf: dead
        if span_pot is not None:
            scale = scale + span_pot[:, 0:P, width].t()
        torch.mm(cells.view(P * B, NT), vw, out=proj_all[N * B + offsets[width]:
                                                         N * B + offsets[width + 1]])
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
    return {"logz": logz, "U": U, "V": V, "W": W, "words": words, "nts": nts,
            "proj": proj_all, "proj_rows": proj_rows, "vw_words": vw_words, "cells": cells_all,
            "scale_start": scale_start, "word_scale": word_scale,
            "rank_sums": rank_sums_all, "offsets": offsets, "vw": vw, "weights": weights,
            "peaks": peaks,
            "pi": pi, "tops": tops, "total": total, "ok": ok, "lengths": lengths}


def _outside(st: dict, grad_logz: Tensor, nt_emits: bool, has_pot: bool,
             need_factors: bool = True, need_words: bool = True, labels: Tensor | None = None):
    """Adjoints from the widest span down; see `engine.inside._outside` for the conventions.

    The gradients of U, V and W are None unless `need_factors`, the preterminal gradient None
    unless `need_words` (span posteriors alone need neither). `labels` (B, N+1, N+1, >= NT),
    when given, receives each nonterminal's adjoint times its scaled cell over every span of
    two or more words (its posterior marginal when grad_logz is one)."""
    U, V, W, words = st["U"], st["V"], st["W"], st["words"]
    N, B, T = words.shape
    NT, R = st["cells"].shape[-1], V.shape[1]
    lengths, ok, total, pi = st["lengths"], st["ok"], st["total"], st["pi"]
    g_root = torch.where(ok, grad_logz / torch.where(ok, total, torch.ones_like(total)),
                         torch.zeros_like(total))                     # (B,)
    grad_root = pi * st["tops"] * g_root[:, None]
    adj_top = words.new_zeros(N + 1, B, NT)                           # adjoint of cell (0, w)
    adj_top[lengths, torch.arange(B)] = pi * g_root[:, None]
    # The adjoints of the projections, in their layout (`_inside`): the words' N B rows, then
    # the rows of the cells' buffers, so that the factor gradients are one product each.
    # Each width's rows are gathered from their parents (`_kernels`) before the width is
    # read, so every row is written once and the buffer needs no zero fill.
    proj, proj_rows = st["proj"], st["proj_rows"]
    adj_proj = torch.empty_like(proj)
    grad_V, grad_W = torch.zeros_like(V), torch.zeros_like(W)
    grad_U = None if U is None else torch.zeros_like(U)
    grad_pot = words.new_zeros(B, N + 1, N + 1) if has_pot else None
    offsets, vw = st["offsets"], st["vw"]
    adj_proj_all = adj_proj[N * B:]                                   # rows of the cells
    # Per-width adjoints of the raw sums, in the row layout of the forward's buffers, and
    # (with U) of the rank sums; every width's split weights in one flat buffer.
    g_all = words.new_empty(offsets[-1], NT)
    g_rank_all = g_all if U is None else words.new_empty(offsets[-1], R)
    weight_flat = torch.cat([words.new_zeros(0)] + [x.flatten() for x in st["weights"][2:]])
    sizes = torch.tensor([0, 0, 0] + [x.numel() for x in st["weights"][2:]], dtype=torch.long)
    gather = functools.partial(_kernels()[1], proj.numpy(), proj_rows.numpy(),
                               weight_flat.numpy(), sizes.cumsum(0)[:-1].numpy(),
                               g_rank_all.numpy(), torch.tensor(offsets).numpy(),
                               adj_proj.numpy(), N, B)
    for width in range(N, 1, -1):
        P = N - width + 1
        rows = slice(offsets[width], offsets[width + 1])
        cells = st["cells"][rows].view(P, B, NT)
        peak = st["peaks"][width]
        gather(width)
        adj = adj_proj_all[rows].view(P, B, 2 * R) @ vw.t()           # (P, B, NT)
        adj[0] += adj_top[width]
        if grad_pot is not None:
            grad_pot[:, 0:P, width] = (adj * cells).sum(-1).t()
        if labels is not None:
            labels[:, 0:P, width, :NT] = (adj * cells).transpose(0, 1)
        g = torch.div(adj, peak.unsqueeze(-1), out=g_all[rows].view(P, B, NT))
        g.nan_to_num_(nan=0.0)                                        # d/d raw sum
        if U is not None:
            torch.mm(g.view(P * B, NT), U, out=g_rank_all[rows])      # (P B, R)
    gather(1)                                                         # the words' rows
    if offsets[-1] and need_factors:
        grad_vw = st["cells"].t() @ adj_proj_all                      # (NT, 2R)
        grad_V[:NT] += grad_vw[:, :R]
        grad_W[:NT] += grad_vw[:, R:]
        if U is not None:
            grad_U += g_all.t() @ st["rank_sums"]
    # Width one.
    a_one = adj_proj[:N * B]                                          # (N B, 2R)
    flat = words.view(N * B, T)
    if need_factors:
        grad_vw = flat.t() @ a_one
        grad_V[NT:] += grad_vw[:, :R]
        grad_W[NT:] += grad_vw[:, R:]
    grad_terminal = None
    if need_words:
        adj_words = (a_one @ st["vw_words"].t()).view(N, B, T)
        grad_terminal = (adj_words * words).transpose(0, 1)
    grad_nt_terminal = None
    if nt_emits:
        nts = st["nts"]
        flat = nts.view(N * B, NT)
        if need_factors:
            grad_vw = flat.t() @ a_one
            grad_V[:NT] += grad_vw[:, :R]
            grad_W[:NT] += grad_vw[:, R:]
        adj_nts = (a_one @ vw.t()).view(N, B, NT)
        adj_nts[0] += adj_top[1]
        grad_nt_terminal = (adj_nts * nts).transpose(0, 1)
    if not need_factors:
        return grad_root, None, None, None, grad_terminal, grad_nt_terminal, grad_pot
    # d/d log x = x * d/dx for every factor.
    return (grad_root, None if U is None else grad_U * U, grad_V * V, grad_W * W,
            grad_terminal, grad_nt_terminal, grad_pot)
