"""The inside pass in the sum semiring, with a hand-written outside pass as its backward.

log Z of each sentence is differentiable with respect to every rule score, so the expected rule
counts of EM and the posterior span marginals are gradients of log Z (Eisner 2016, "Inside-Outside
and Forward-Backward Algorithms Are Just Backprop"). The outside pass below is that gradient
written by hand inside a `torch.autograd.Function`; `engine.reference` gives the same numbers by
plain autograd and the tests hold the two together.

Why the layout looks the way it does (it is what makes the pass run near the matrix-multiply
throughput of a small CPU):

- Cells hold *scaled probabilities*: each cell's vector over symbols is divided by its maximum,
  and the log of that maximum is kept beside it as the cell's scale. Sums over split points and
  rules are then plain matrix products, with no exp/log per element. The scales are constants for
  the gradient, which is exact because they cancel in log Z.
- Two copies of the chart, `by_start[i, b, w]` = cell (i, i+w) and `by_end[j, b, N-w]` = cell
  (j-w, j), make every read for one span width a strided slice: for width w the left children of
  all spans are `by_start[0:P, :, u]` and the right children `by_end[w:N+1, :, N-w+u]`. Putting
  the span dimension first lets span x batch merge into one batch dimension without a copy.
- Children are split into blocks by kind. Nonterminal pairs go through one batched matrix product
  over split points and one product with the rules reshaped to (NT, NT*NT). A preterminal child
  occurs only at a sentence edge of the span (its width is one), so its rules are folded into
  per-position (NT, NT) matrices once per batch. Preterminal pairs occur only at width two.

Shapes: B sentences, N = longest length, NT nonterminals, T preterminals, P = N - w + 1 spans.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

NEG_INF = float("-inf")


@dataclass
class Chart:
    """The filled inside chart of one batch (scaled probabilities and their log scales)."""
    by_start: Tensor    # (N+1, B, N+1, NT)  cell (i, i+w) at [i, :, w]
    by_end: Tensor      # (N+1, B, N+1, NT)  cell (j-w, j) at [j, :, N-w]
    scale_start: Tensor  # (N+1, B, N+1)
    scale_end: Tensor    # (N+1, B, N+1)
    term: Tensor        # (N, B, T) scaled preterminal probabilities
    term_scale: Tensor  # (N, B)
    min_width: int      # narrowest nonterminal span: 1 if nonterminals emit words, else 2

    def log_inside(self, start: int, width: int, b: int) -> Tensor:
        """(NT,) log inside scores of the nonterminals over one span (for samplers/tests)."""
        return self.by_start[start, b, width].log() + self.scale_start[start, b, width]

    def log_term(self, pos: int, b: int) -> Tensor:
        """(T,) log scores of the preterminals over the word at `pos`."""
        return self.term[pos, b].log() + self.term_scale[pos, b]


def _log_scale(values: Tensor) -> tuple[Tensor, Tensor]:
    """Split `values` (..., K) >= 0 into values / max and log max; all-zero rows get scale -inf."""
    peak = values.amax(-1)
    positive = peak > 0
    safe = torch.where(positive, peak, torch.ones_like(peak))
    return values / safe.unsqueeze(-1), torch.where(positive, safe.log(), NEG_INF)


def _finite(x: Tensor) -> Tensor:
    """-inf -> 0, so that exp(a - max) never becomes exp(-inf + inf)."""
    return torch.where(torch.isfinite(x), x, torch.zeros_like(x))


def _combine(parts: list[tuple[Tensor, Tensor]], pot: Tensor | None):
    """Sum (value, log scale) parts of shape ((P, B, NT), (P, B)) into one scaled cell vector.

    Returns (scaled values, log scale, [weight of each part]) where weight_k = exp(scale_k -
    scale), the factor by which part k's values entered the result (the backward needs it).
    """
    top = torch.stack([s for _, s in parts]).amax(0)
    top_f = _finite(top)
    total = None
    for values, scale in parts:
        term = values * torch.exp(scale - top_f).unsqueeze(-1)
        total = term if total is None else total + term
    scaled, peak = _log_scale(total)
    scale = top_f + peak
    scale = torch.where(torch.isfinite(top), scale, NEG_INF)
    if pot is not None:
        scale = scale + pot
    alive = torch.isfinite(scale)
    weights = [torch.where(alive, torch.exp(s + (pot if pot is not None else 0) - _finite(scale)),
                           torch.zeros_like(scale)) for _, s in parts]
    return scaled, scale, weights


def _rule_blocks(binary: Tensor, nt: int):
    """Probability-space rule blocks. binary: (NT, S, S) log-probs."""
    rules = binary.exp()
    return (rules[:, :nt, :nt].reshape(nt, nt * nt),   # (NT, NT*NT)   A -> B C, both nonterminal
            rules[:, :nt, nt:],                         # (NT, NT, T)   A -> B c
            rules[:, nt:, :nt],                         # (NT, T, NT)   A -> b C
            rules[:, nt:, nt:])                         # (NT, T, T)    A -> b c


def inside_chart(binary: Tensor, terminal: Tensor, nt_terminal: Tensor | None = None,
                 span_pot: Tensor | None = None, keep: bool = False):
    """Fill the inside chart for a batch. See `log_partition` for the argument shapes.

    Returns the Chart, and when `keep` also what the backward needs (split sums per width).
    """
    B, N, T = terminal.shape
    NT = binary.shape[0]
    dtype = terminal.dtype
    r_nn, r_np, r_pn, r_pp = _rule_blocks(binary, NT)
    min_w = 1 if nt_terminal is not None else 2

    term_sc, term_scale = _log_scale(terminal.transpose(0, 1).exp())  # (N, B, T), (N, B)
    term_sc = term_sc.contiguous()
    # Preterminal children folded into per-position matrices: right_mats[pos, b][A, B] =
    # sum_c p(A -> B c) t[pos, c]; left_mats[pos, b][A, C] = sum_b p(A -> b C) t[pos, b].
    right_mats = (term_sc.view(N * B, T) @ r_np.permute(2, 0, 1).reshape(T, NT * NT)
                  ).view(N, B, NT, NT)
    left_mats = (term_sc.view(N * B, T) @ r_pn.permute(1, 0, 2).reshape(T, NT * NT)
                 ).view(N, B, NT, NT)

    by_start = terminal.new_zeros(N + 1, B, N + 1, NT)
    by_end = terminal.new_zeros(N + 1, B, N + 1, NT)
    scale_start = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    scale_end = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    if nt_terminal is not None:
        cells, sc = _log_scale(nt_terminal.transpose(0, 1).exp())  # (N, B, NT)
        by_start[0:N, :, 1] = cells
        by_end[1:N + 1, :, N - 1] = cells
        scale_start[0:N, :, 1] = sc
        scale_end[1:N + 1, :, N - 1] = sc

    saved = []
    for w in range(2, N + 1):
        P = N - w + 1
        parts = []
        split_sums = None
        lo, hi = min_w, w - min_w  # left widths whose both children are nonterminals
        if hi >= lo:
            K = hi - lo + 1
            left = by_start[0:P, :, lo:hi + 1]                    # (P, B, K, NT)
            right = by_end[w:N + 1, :, N - w + lo:N - w + hi + 1]  # (P, B, K, NT)
            pair_scale = scale_start[0:P, :, lo:hi + 1] + scale_end[w:N + 1, :, N - w + lo:N - w + hi + 1]
            top = pair_scale.amax(-1)                              # (P, B)
            weight = torch.exp(pair_scale - _finite(top).unsqueeze(-1))  # (P, B, K)
            left_w = (left * weight.unsqueeze(-1)).view(P * B, K, NT)
            split_sums = torch.bmm(left_w.transpose(1, 2), right.reshape(P * B, K, NT))
            values = (split_sums.view(P * B, NT * NT) @ r_nn.t()).view(P, B, NT)
            parts.append((values, top))
        if w - 1 >= min_w:
            left = by_start[0:P, :, w - 1]                         # (P, B, NT), right child c
            values = torch.bmm(right_mats[w - 1:N].reshape(P * B, NT, NT),
                               left.reshape(P * B, NT, 1)).view(P, B, NT)
            parts.append((values, scale_start[0:P, :, w - 1] + term_scale[w - 1:N]))
            right = by_end[w:N + 1, :, N - w + 1]                  # (P, B, NT), left child b
            values = torch.bmm(left_mats[0:P].reshape(P * B, NT, NT),
                               right.reshape(P * B, NT, 1)).view(P, B, NT)
            parts.append((values, term_scale[0:P] + scale_end[w:N + 1, :, N - w + 1]))
        if w == 2:
            pairs = term_sc[0:P, :, :, None] * term_sc[1:N, :, None, :]  # (P, B, T, T)
            values = (pairs.view(P * B, T * T) @ r_pp.reshape(NT, T * T).t()).view(P, B, NT)
            parts.append((values, term_scale[0:P] + term_scale[1:N]))
        pot = None if span_pot is None else span_pot[:, 0:P, w].t()   # (P, B)
        cells, scale, weights = _combine(parts, pot)
        by_start[0:P, :, w] = cells
        by_end[w:N + 1, :, N - w] = cells
        scale_start[0:P, :, w] = scale
        scale_end[w:N + 1, :, N - w] = scale
        if keep:
            saved.append((split_sums, weights))
    chart = Chart(by_start, by_end, scale_start, scale_end, term_sc, term_scale, min_w)
    return (chart, saved, right_mats, left_mats) if keep else chart


def _root_scores(chart: Chart, root: Tensor, lengths: Tensor):
    """log Z per sentence and the root cells. root: (B, NT) log-probs."""
    B = root.shape[0]
    idx = torch.arange(B)
    top = chart.by_start[0, idx, lengths]        # (B, NT)
    top_scale = chart.scale_start[0, idx, lengths]
    pi = root.exp()
    total = (pi * top).sum(-1)
    return total.log() + top_scale, top, pi, total


class _LogPartition(torch.autograd.Function):
    @staticmethod
    def forward(ctx, root, binary, terminal, nt_terminal, span_pot, lengths):
        with torch.no_grad():
            chart, saved, right_mats, left_mats = inside_chart(
                binary, terminal, nt_terminal, span_pot, keep=True)
            logz, top, pi, total = _root_scores(chart, root, lengths)
        ctx.save_for_backward(root, binary, lengths)
        ctx.state = (chart, saved, right_mats, left_mats, top, pi, total,
                     nt_terminal is not None, span_pot is not None)
        return logz

    @staticmethod
    def backward(ctx, grad_logz):
        root, binary, lengths = ctx.saved_tensors
        chart, saved, right_mats, left_mats, top, pi, total, nt_emits, has_pot = ctx.state
        ctx.state = None
        with torch.no_grad():
            grads = _outside(root, binary, lengths, chart, saved, right_mats, left_mats,
                             top, pi, total, grad_logz, nt_emits, has_pot)
        return grads + (None,)


def _outside(root, binary, lengths, chart, saved, right_mats, left_mats, top, pi, total,
             grad_logz, nt_emits, has_pot):
    """Adjoints of log Z with respect to every scaled chart cell, from the widest span down.

    adj(cell)[A] = d log Z / d scaled_inside(cell)[A]; adj * scaled_inside is the posterior
    marginal of A over that span, a number in [0, 1], so nothing here needs rescaling.
    """
    N1, B, _, NT = chart.by_start.shape
    N = N1 - 1
    T = chart.term.shape[-1]
    r_nn, r_np, r_pn, r_pp = _rule_blocks(binary, NT)
    idx = torch.arange(B)
    ok = total > 0
    g = torch.where(ok, grad_logz / torch.where(ok, total, torch.ones_like(total)),
                    torch.zeros_like(total))                        # (B,)
    grad_root = pi * top * g[:, None]                                # (B, NT) d/d log pi
    adj_start = torch.zeros_like(chart.by_start)
    adj_end = torch.zeros_like(chart.by_end)
    adj_start[0, idx, lengths] = pi * g[:, None]

    grad_nn = binary.new_zeros(NT, NT * NT)
    grad_pp = binary.new_zeros(NT, T * T)
    grad_right_mats = torch.zeros_like(right_mats)
    grad_left_mats = torch.zeros_like(left_mats)
    adj_term = torch.zeros_like(chart.term)                          # (N, B, T)
    grad_pot = chart.term.new_zeros(B, N + 1, N + 1) if has_pot else None
    min_w = chart.min_width
    for w in range(N, 1, -1):
        P = N - w + 1
        split_sums, weights = saved[w - 2]
        adj = adj_start[0:P, :, w] + adj_end[w:N + 1, :, N - w]      # (P, B, NT)
        if grad_pot is not None:
            grad_pot[:, 0:P, w] = (adj * chart.by_start[0:P, :, w]).sum(-1).t()
        k = 0
        lo, hi = min_w, w - min_w
        if hi >= lo:
            K = hi - lo + 1
            g_nn = (adj * weights[k].unsqueeze(-1)).view(P * B, NT)
            k += 1
            grad_nn += g_nn.t() @ split_sums.view(P * B, NT * NT)
            g_pairs = (g_nn @ r_nn).view(P * B, NT, NT)              # d/d split_sums
            left = chart.by_start[0:P, :, lo:hi + 1]
            right = chart.by_end[w:N + 1, :, N - w + lo:N - w + hi + 1]
            pair_scale = chart.scale_start[0:P, :, lo:hi + 1] + \
                chart.scale_end[w:N + 1, :, N - w + lo:N - w + hi + 1]
            weight = torch.exp(pair_scale - _finite(pair_scale.amax(-1)).unsqueeze(-1))
            weight = weight.view(P * B, K, 1)
            left_w = left.reshape(P * B, K, NT) * weight
            g_left = torch.bmm(right.reshape(P * B, K, NT), g_pairs.transpose(1, 2)) * weight
            g_right = torch.bmm(left_w, g_pairs)
            adj_start[0:P, :, lo:hi + 1] += g_left.view(P, B, K, NT)
            adj_end[w:N + 1, :, N - w + lo:N - w + hi + 1] += g_right.view(P, B, K, NT)
        if w - 1 >= min_w:
            g_np = adj * weights[k].unsqueeze(-1)                    # (P, B, NT)
            k += 1
            left = chart.by_start[0:P, :, w - 1]
            mats = right_mats[w - 1:N].reshape(P * B, NT, NT)
            adj_start[0:P, :, w - 1] += torch.bmm(
                mats.transpose(1, 2), g_np.reshape(P * B, NT, 1)).view(P, B, NT)
            grad_right_mats[w - 1:N] += g_np.unsqueeze(-1) * left.unsqueeze(-2)
            g_pn = adj * weights[k].unsqueeze(-1)
            k += 1
            right = chart.by_end[w:N + 1, :, N - w + 1]
            mats = left_mats[0:P].reshape(P * B, NT, NT)
            adj_end[w:N + 1, :, N - w + 1] += torch.bmm(
                mats.transpose(1, 2), g_pn.reshape(P * B, NT, 1)).view(P, B, NT)
            grad_left_mats[0:P] += g_pn.unsqueeze(-1) * right.unsqueeze(-2)
        if w == 2:
            g_pp = (adj * weights[k].unsqueeze(-1)).view(P * B, NT)
            a, b_ = chart.term[0:P], chart.term[1:N]                 # (P, B, T)
            pairs = (a[:, :, :, None] * b_[:, :, None, :]).view(P * B, T * T)
            grad_pp += g_pp.t() @ pairs
            g_pairs = (g_pp @ r_pp.reshape(NT, T * T)).view(P, B, T, T)
            adj_term[0:P] += (g_pairs * b_[:, :, None, :]).sum(-1)
            adj_term[1:N] += (g_pairs * a[:, :, :, None]).sum(-2)

    # Fold the per-position matrices back into rules and preterminal cells.
    term_flat = chart.term.view(N * B, T)
    gr = grad_right_mats.view(N * B, NT * NT)
    gl = grad_left_mats.view(N * B, NT * NT)
    w_np = r_np.permute(2, 0, 1).reshape(T, NT * NT)
    w_pn = r_pn.permute(1, 0, 2).reshape(T, NT * NT)
    adj_term += (gr @ w_np.t() + gl @ w_pn.t()).view(N, B, T)
    grad_np = (term_flat.t() @ gr).view(T, NT, NT).permute(1, 2, 0)   # (NT, NT, T)
    grad_pn = (term_flat.t() @ gl).view(T, NT, NT).permute(1, 0, 2)   # (NT, T, NT)

    rules = binary.exp()
    grad_rules = torch.empty_like(binary)
    grad_rules[:, :NT, :NT] = grad_nn.view(NT, NT, NT)
    grad_rules[:, :NT, NT:] = grad_np
    grad_rules[:, NT:, :NT] = grad_pn
    grad_rules[:, NT:, NT:] = grad_pp.view(NT, T, T)
    grad_binary = grad_rules * rules                                  # d/d log p = p * d/dp
    grad_terminal = (adj_term * chart.term).transpose(0, 1)           # (B, N, T)
    grad_nt_terminal = None
    if nt_emits:
        adj1 = adj_start[0:N, :, 1] + adj_end[1:N + 1, :, N - 1]
        grad_nt_terminal = (adj1 * chart.by_start[0:N, :, 1]).transpose(0, 1)
    return grad_root, grad_binary, grad_terminal, grad_nt_terminal, grad_pot


def log_partition(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
                  nt_terminal: Tensor | None = None, span_pot: Tensor | None = None) -> Tensor:
    """log Z = log sum over all trees of p(tree, sentence), per sentence, differentiable.

    root        (NT,) or (B, NT)  log p(top symbol)
    binary      (NT, S, S)        log p(A -> B C); children: nonterminals first, then preterminals
    terminal    (B, N, T)         log p(preterminal -> word at position)
    lengths     (B,) int64        sentence lengths (positions past a length are ignored)
    nt_terminal (B, N, NT)        log p(nonterminal -> word), for grammars in which nonterminals
                                  also emit words (general CNF); None in the induction layout
    span_pot    (B, N+1, N+1)     optional log potential added to every nonterminal cell of span
                                  [start, width] (width >= 2); its gradient is the posterior span
                                  marginal, and -inf forbids a span (partial brackets)

    Sentences with no parse get -inf (and zero gradients), never NaN.
    """
    B, N, _ = terminal.shape
    if root.dim() == 1:
        root = root.expand(B, -1)
    lengths = torch.as_tensor(lengths, dtype=torch.long)
    if N == 0 or int(lengths.min()) < 1 or int(lengths.max()) > N:
        raise ValueError("lengths must lie in [1, N]")
    # Pad positions past each length with probability-one emissions: finite values keep the
    # unused cells of the chart free of NaN; they never reach a used cell.
    pad = torch.arange(N)[None, :] >= lengths[:, None]
    if bool(pad.any()):
        terminal = terminal.masked_fill(pad[..., None], 0.0)
        if nt_terminal is not None:
            nt_terminal = nt_terminal.masked_fill(pad[..., None], 0.0)
    return _LogPartition.apply(root, binary, terminal, nt_terminal, span_pot, lengths)
