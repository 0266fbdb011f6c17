"""The inside pass in the sum semiring, with a hand-written outside pass as its backward.

log Z of each sentence is differentiable with respect to every rule score, so the expected rule
counts of EM and the posterior span marginals are gradients of log Z (Eisner 2016, "Inside-Outside
and Forward-Backward Algorithms Are Just Backprop"). The outside pass below is that gradient
written by hand inside a `torch.autograd.Function`; `engine.reference` gives the same numbers by
plain autograd and the tests hold the two together.

Why the layout looks the way it does (on a small CPU the pass is bound by memory traffic and
per-operation overhead rather than arithmetic; `scripts/bench_inside.py` measures it):

- Cells hold *scaled probabilities*: each cell's vector over symbols is divided by its maximum,
  and the log of that maximum is kept beside it as the cell's scale. Sums over split points and
  rules are then plain matrix products, with no exp/log per element. The scales are constants for
  the gradient, which is exact because they cancel in log Z. The nonterminal and preterminal
  vectors of one word share one scale, so every split point of a span (whatever the kind of its
  children) has its weight read from one strided slice of the scale tables.
- One chart, `by_start[i, b, w]` = cell (i, i+w), serves every read for one span width as a
  strided view without a copy: the left children of all spans are the slice
  `by_start[0:P, :, u]`, and the right children, cells (i+u, i+w), sit at offsets linear in both
  i and u (see `right_children`). Putting the span dimension first lets span x batch merge into
  one batch dimension without a copy.
- Children are split into blocks by kind. Nonterminal pairs go through one batched matrix product
  over split points and one product with the rules reshaped to (NT*NT, NT). A preterminal child
  occurs only at a sentence edge of the span (its width is one), so its rules are folded into
  per-position matrices once per batch, and each span needs one row-vector product per edge.
- The nonterminal axis is padded with zero symbols to a multiple of 8 (30 -> 32): the matrix
  kernels of the CPU run markedly faster on such sizes, and the zero rows change no sum.
- The backward keeps the split weights and the cell maxima, and recomputes each chunk's weighted
  children and split sums while they are in cache (on this machine's 2 MiB L2 that is faster
  than reading them back from memory). It gathers the per-position rule gradients into two
  buffers, folded by one product at the end.
- Rules may also be given per sentence, (B, NT, S, S), as compound grammars need: the folds and
  the rule products then become one product per sentence, the rest is unchanged.

Shapes: B sentences, N = longest length, NT nonterminals, T preterminals, P = N - w + 1 spans,
Q = NT padded.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

NEG_INF = float("-inf")
PAD_MULTIPLE = 8  # see the module docstring: why the nonterminal axis is padded
CHUNK_BYTES = 2 ** 20  # split sums processed per chunk of spans (about one core's L2 cache)


@dataclass
class Chart:
    """The filled inside chart of one batch (scaled probabilities and their log scales).

    The nonterminal axis of `by_start` is padded to Q >= NT with zero symbols; use
    `log_inside` (which drops the padding) rather than reading the tensors directly.
    """
    by_start: Tensor    # (N+1, B, N+1, Q)  cell (i, i+w) at [i, :, w]
    scale_start: Tensor  # (N+1, B, N+1)
    term: Tensor        # (N, B, T) scaled preterminal probabilities
    term_scale: Tensor  # (N, B) log scale of each word (shared by its width-one cells)
    min_width: int      # narrowest nonterminal span: 1 if nonterminals emit words, else 2
    num_nt: int         # NT, the unpadded number of nonterminals

    def log_inside(self, start: int, width: int, b: int) -> Tensor:
        """(NT,) log inside scores of the nonterminals over one span (for samplers/tests)."""
        return self.by_start[start, b, width, :self.num_nt].log() + \
            self.scale_start[start, b, width]

    def log_term(self, pos: int, b: int) -> Tensor:
        """(T,) log scores of the preterminals over the word at `pos`."""
        return self.term[pos, b].log() + self.term_scale[pos, b]


@dataclass
class _Rules:
    """Probability-space rule blocks, nonterminal axes padded to Q (zeros).

    With rules per sentence every block has a leading sentence axis (B, ...).
    """
    nn: Tensor      # (Q*Q, Q)  [(B, C), A] = p(A -> B C), both children nonterminal
    right: Tensor   # (T, Q*Q)  [c, (B, A)] = p(A -> B c)
    left: Tensor    # (T, Q*Q)  [b, (C, A)] = p(A -> b C)
    pair: Tensor    # (T, T*Q)  [c, (b, A)] = p(A -> b c), both children preterminal
    prob: Tensor    # (NT, S, S) the unpadded probabilities, reused by the backward


def _padded(nt: int) -> int:
    return -(-nt // PAD_MULTIPLE) * PAD_MULTIPLE


def _last3(x: Tensor, order: tuple[int, int, int]) -> Tensor:
    """Permute the last three axes of x, keeping any leading (sentence) axis in place."""
    lead = x.dim() - 3
    return x.permute(*range(lead), *(lead + o for o in order))


def _rule_blocks(binary: Tensor, q: int) -> _Rules:
    """binary: (NT, S, S) or per sentence (B, NT, S, S) log-probs -> the padded probability
    blocks used by the passes."""
    nt, s, _ = binary.shape[-3:]
    lead = binary.shape[:-3]
    t = s - nt
    rules = binary.exp()
    nn = binary.new_zeros(*lead, q, q, q)
    nn[..., :nt, :nt, :nt] = _last3(rules[..., :, :nt, :nt], (1, 2, 0))
    right = binary.new_zeros(*lead, t, q, q)
    right[..., :, :nt, :nt] = _last3(rules[..., :, :nt, nt:], (2, 1, 0))
    left = binary.new_zeros(*lead, t, q, q)
    left[..., :, :nt, :nt] = _last3(rules[..., :, nt:, :nt], (1, 2, 0))
    pair = binary.new_zeros(*lead, t, t, q)
    pair[..., :nt] = _last3(rules[..., :, nt:, nt:], (2, 1, 0))
    return _Rules(nn.view(*lead, q * q, q), right.view(*lead, t, q * q),
                  left.view(*lead, t, q * q), pair.view(*lead, t, t * q), rules)


def _fold(vectors: Tensor, mats: Tensor) -> Tensor:
    """(M, B, K) vectors times (K, X) rule matrices, or per sentence (B, K, X): (M, B, X)."""
    if mats.dim() == 2:
        M, B, K = vectors.shape
        return (vectors.reshape(M * B, K) @ mats).view(M, B, mats.shape[-1])  # M may be 0
    return torch.bmm(vectors.transpose(0, 1), mats).transpose(0, 1).contiguous()


def _gather(vectors: Tensor, grads: Tensor, per_sentence: bool) -> Tensor:
    """The rule-matrix gradient of `_fold` for (M, B, K) vectors and (M, B, X) gradients: summed
    over M and B, (K, X), or over M only, (B, K, X), when the rules are per sentence."""
    M, B, K = vectors.shape
    if not per_sentence:
        return vectors.reshape(M * B, K).t() @ grads.reshape(M * B, -1)
    return torch.bmm(vectors.permute(1, 2, 0), grads.transpose(0, 1))


def _unfold(grads: Tensor, mats: Tensor) -> Tensor:
    """The vectors' gradient of `_fold`: (M, B, X) gradients times the (K, X) or (B, K, X)
    rule matrices transposed: (M, B, K)."""
    if mats.dim() == 2:
        M, B, X = grads.shape
        return (grads.reshape(M * B, X) @ mats.t()).view(M, B, mats.shape[0])
    return torch.bmm(grads.transpose(0, 1), mats.transpose(1, 2)).transpose(0, 1)


@dataclass
class _Saved:
    """What the forward keeps for the backward, per width w (index w - 2)."""
    weights: list      # (P, B, w-1) weight of split u (at u-1) relative to the span's top
    peaks: list        # (P*B,) the maximum each cell was divided by
    right_mats: Tensor  # (N, B, Q, Q)   [pos][B, A] = sum_c p(A -> B c) t[pos, c]
    left_mats: Tensor   # (N, B, Q, Q)   [pos][C, A] = sum_b p(A -> b C) t[pos, b]
    pair_mats: Tensor   # (N-1, B, T, Q) [pos-1][b, A] = sum_c p(A -> b c) t[pos, c]


def _fill(binary: Tensor, terminal: Tensor, nt_terminal: Tensor | None,
          span_pot: Tensor | None, keep: bool):
    """Fill the inside chart; with `keep` also return the `_Saved` state for the backward."""
    B, N, T = terminal.shape
    NT = binary.shape[-3]
    Q = _padded(NT)
    rules = _rule_blocks(binary, Q)
    min_w = 1 if nt_terminal is not None else 2

    # One scale per word, shared by its preterminal and nonterminal vectors.
    word_scale = word_scales(terminal, nt_terminal)                  # (B, N)
    shift = word_scale.nan_to_num(neginf=0.0).unsqueeze(-1)          # finite, for the exp
    term_sc = (terminal - shift).exp_().transpose(0, 1).contiguous()  # (N, B, T)
    term_scale = word_scale.t().contiguous()                         # (N, B)

    # Preterminal children folded into per-position matrices (row-vector form, see _Rules).
    # The preterminal-pair matrices are kept apart: they serve width two only, and leaving them
    # out of the matrices read at every width keeps those small enough to stay in cache.
    right_mats = _fold(term_sc, rules.right).view(N, B, Q, Q)
    left_mats = _fold(term_sc, rules.left).view(N, B, Q, Q)
    pair_mats = _fold(term_sc[1:], rules.pair).view(N - 1, B, T, Q)

    by_start = terminal.new_zeros(N + 1, B, N + 1, Q)
    scale_start = terminal.new_full((N + 1, B, N + 1), NEG_INF)
    scale_start[0:N, :, 1] = term_scale
    if nt_terminal is not None:
        by_start[0:N, :, 1, :NT] = (nt_terminal - shift).exp_().transpose(0, 1)

    saved = _Saved([], [], right_mats, left_mats, pair_mats) if keep else None
    for w in range(2, N + 1):
        P = N - w + 1
        PB = P * B
        # Split u puts cell (i, i+u) left of cell (i+u, i+w); its weight is the product of the
        # two children's scales relative to the largest product over the span's splits.
        pair = scale_start[0:P, :, 1:w] + right_children(scale_start, w, 1, w - 1)  # (P, B, w-1)
        top = pair.amax(-1).nan_to_num_(neginf=0.0)                           # (P, B)
        weight = (pair - top.unsqueeze(-1)).exp_()
        total = None
        lo, hi = min_w, w - min_w  # left widths whose both children are nonterminals
        if hi >= lo:
            K = hi - lo + 1
            total = _split_products(by_start[0:P, :, lo:hi + 1].view(PB, K, Q),
                                    weight[..., lo - 1:hi].reshape(PB, K, 1),
                                    right_children(by_start, w, lo, hi).view(PB, K, Q),
                                    rules.nn)
            total = total.view(PB, 1, Q)
        if w - 1 >= min_w:
            # A -> B c: left child (i, i+w-1), preterminal c over word i+w-1.
            vec = by_start[0:P, :, w - 1] * weight[..., w - 2:w - 1]            # (P, B, Q)
            mats = right_mats[w - 1:N].view(PB, Q, Q)
            total = _add_rowvec(total, vec.view(PB, 1, Q), mats)
            # A -> b C: preterminal b over word i, right child (i+1, i+w).
            vec = by_start[1:P + 1, :, w - 1] * weight[..., 0:1]
            total = _add_rowvec(total, vec.view(PB, 1, Q), left_mats[0:P].view(PB, Q, Q))
        if w == 2:
            # A -> b c over words i and i+1.
            vec = term_sc[0:P] * weight[..., 0:1]                               # (P, B, T)
            total = _add_rowvec(total, vec.view(PB, 1, T), pair_mats.view(PB, T, Q))
            if not keep:
                del pair_mats
        total = total.view(PB, Q)
        peak = total.amax(-1)                                                  # (P*B,)
        cells = by_start[0:P, :, w].view(PB, Q)
        torch.div(total, peak.unsqueeze(-1), out=cells).nan_to_num_(nan=0.0)  # dead (0/0): 0
        scale = top + peak.log().view(P, B)                     # log 0 = -inf marks it dead
        if span_pot is not None:
            scale = scale + span_pot[:, 0:P, w].t()
        scale_start[0:P, :, w] = scale
        if keep:
            saved.weights.append(weight)
            saved.peaks.append(peak)
    chart = Chart(by_start, scale_start, term_sc, term_scale, min_w, NT)
    return chart, saved, rules


def word_scales(terminal: Tensor, nt_terminal: Tensor | None) -> Tensor:
    """(B, N) the largest log score of any symbol over each word.

    terminal (B, N, T) may have T = 0: a general CNF grammar in which every symbol that emits
    words also has binary rules (Lari & Young 1990, "The estimation of stochastic context-free
    grammars using the Inside-Outside algorithm") has no pure preterminal, and its words are
    scored by nt_terminal alone. A reduction over an empty axis is an error in torch, so that
    axis contributes -inf here instead.
    """
    B, N, T = terminal.shape
    scale = terminal.amax(-1) if T else terminal.new_full((B, N), NEG_INF)
    if nt_terminal is not None:
        scale = torch.maximum(scale, nt_terminal.amax(-1))
    return scale


def right_children(chart: Tensor, w: int, u0: int, u1: int) -> Tensor:
    """The right children of every span of width w, for splits u0..u1, as a strided view.

    chart is laid out by start, (N+1, B, N+1, ...) with cell (i, i+v) at [i, :, v]. Split u of
    span (i, i+w) has right child (i+u, i+w), stored at [i+u, :, w-u]: its offset is
    i*s0 + w*s2 + u*(s0 - s2), linear in both i and u, so the result, (P, B, u1-u0+1, ...) with
    [i, b, k] = cell (i+u0+k, i+w), needs no copy. Within one width these cells are distinct,
    so the view may also be written to (the outside pass adds adjoints through it).
    """
    s = chart.stride()
    size = (chart.shape[0] - w, chart.shape[1], u1 - u0 + 1) + tuple(chart.shape[3:])
    stride = (s[0], s[1], s[0] - s[2]) + tuple(s[3:])
    return chart.as_strided(size, stride, chart.storage_offset() + u0 * s[0] + (w - u0) * s[2])


def _by_end(by_start: Tensor) -> Tensor:
    """A copy of the chart laid out by end: [j, :, N-w] = cell (j-w, j), zeros elsewhere."""
    N = by_start.shape[0] - 1
    by_end = torch.zeros_like(by_start)
    for w in range(1, N + 1):
        by_end[w:N + 1, :, N - w] = by_start[0:N + 1 - w, :, w]
    return by_end


def _span_chunk(q: int) -> int:
    """Spans per chunk so that a chunk's Q x Q split sums fit in a core's L2 cache."""
    return max(1, CHUNK_BYTES // (4 * q * q))


def _split_products(left: Tensor, weight: Tensor, right: Tensor, nn: Tensor) -> Tensor:
    """The split sums of each span, sum_k weight_k left_k^T right_k (Q, Q), times the rules.

    left and right (M, K, Q) are the children (views into the chart), weight (M, K, 1) the split
    weights; returns (M, Q). Done in chunks of spans, so that each chunk's weighted children
    and split sums are made and used while they are in cache. The backward recomputes them the
    same way rather than keeping them: reading stored copies back from main memory is slower
    than one more elementwise product and small batched product per chunk.
    """
    M, _, Q = left.shape
    chunk = _chunk_rows(Q, nn)
    total = left.new_empty(M, Q)
    for c0 in range(0, M, chunk):
        c1 = min(M, c0 + chunk)
        weighted = left[c0:c1] * weight[c0:c1]
        part = torch.bmm(weighted.transpose(1, 2), right[c0:c1]).view(c1 - c0, Q * Q)
        if nn.dim() == 2:
            torch.mm(part, nn, out=total[c0:c1])
        else:  # rules per sentence: rows are (span, sentence), so one product per sentence
            B = nn.shape[0]
            per = torch.bmm(part.view(-1, B, Q * Q).transpose(0, 1), nn)  # (B, spans, Q)
            total[c0:c1].view(-1, B, Q).copy_(per.transpose(0, 1))
    return total


def _chunk_rows(q: int, nn: Tensor) -> int:
    """Rows (span x sentence) per chunk; a whole number of spans when rules are per sentence."""
    chunk = _span_chunk(q)
    if nn.dim() == 3:
        B = nn.shape[0]
        chunk = max(1, chunk // B) * B
    return chunk


def _add_rowvec(total: Tensor | None, vec: Tensor, mats: Tensor) -> Tensor:
    """total + vec @ mats for (M, 1, K) row vectors and (M, K, Q) matrices."""
    return torch.bmm(vec, mats) if total is None else torch.baddbmm(total, vec, mats)


def inside_chart(binary: Tensor, terminal: Tensor, nt_terminal: Tensor | None = None,
                 span_pot: Tensor | None = None) -> Chart:
    """Fill the inside chart for a batch (no gradient). See `log_partition` for the shapes."""
    with torch.no_grad():
        return _fill(binary, terminal, nt_terminal, span_pot, keep=False)[0]


def _root_scores(chart: Chart, root: Tensor, lengths: Tensor):
    """log Z per sentence, the root cells (B, Q), padded root probabilities and their sums."""
    B, NT = root.shape
    idx = torch.arange(B)
    top = chart.by_start[0, idx, lengths]        # (B, Q)
    top_scale = chart.scale_start[0, idx, lengths]
    pi = root.new_zeros(B, top.shape[-1])
    pi[:, :NT] = root.exp()
    total = (pi * top).sum(-1)
    return total.log() + top_scale, top, top_scale, pi, total


class _LogPartition(torch.autograd.Function):
    @staticmethod
    def forward(ctx, root, binary, terminal, nt_terminal, span_pot, lengths):
        with torch.no_grad():
            chart, saved, rules = _fill(binary, terminal, nt_terminal, span_pot, keep=True)
            logz, top, top_scale, pi, total = _root_scores(chart, root, lengths)
        ctx.save_for_backward(binary, lengths)
        ctx.state = (chart, saved, rules, top, top_scale, pi, total,
                     nt_terminal is not None, span_pot is not None)
        return logz

    @staticmethod
    def backward(ctx, grad_logz):
        binary, lengths = ctx.saved_tensors
        state = ctx.state
        ctx.state = None  # free the chart as soon as the gradient is taken
        # Only the adjoint chart is always needed; the rule and word gradients (the larger part
        # of the work) are made only when asked for, e.g. not for span posteriors alone.
        need = ctx.needs_input_grad
        with torch.no_grad():
            grads = _outside(binary, lengths, *state, grad_logz,
                             need_rules=need[1], need_words=need[2])
        return grads + (None,)


def _outside(binary, lengths, chart: Chart, saved: _Saved, rules: _Rules, top, top_scale, pi,
             total, nt_emits, has_pot, grad_logz, need_rules: bool = True,
             need_words: bool = True, adjoints: dict | None = None):
    """Adjoints of log Z with respect to every scaled chart cell, from the widest span down.

    The rule gradient is None unless `need_rules`, the preterminal gradient None unless
    `need_words`; the adjoints of the cells, and so the root, span and nonterminal-word
    gradients, are the same either way. `adjoints`, when given, receives the adjoint chart
    under "chart", (N+1, B, N+1, Q) laid out like `chart.by_start` (see `span_tables`).

    adj(cell)[A] = d log Z / d scaled_inside(cell)[A]; adj * scaled_inside is the posterior
    marginal of A over that span, a number in [0, 1], so nothing here needs rescaling. A cell is
    its raw sum divided by its peak, so the raw sum's adjoint is adj / peak.
    """
    N1, B, _, Q = chart.by_start.shape
    N = N1 - 1
    T = chart.term.shape[-1]
    NT = binary.shape[-3]
    idx = torch.arange(B)
    ok = (total > 0) & torch.isfinite(top_scale)  # unparseable sentences get zero gradients
    g_root = torch.where(ok, grad_logz / torch.where(ok, total, torch.ones_like(total)),
                         torch.zeros_like(total))                       # (B,)
    grad_root = (pi * top * g_root[:, None])[:, :NT]                    # (B, NT) d/d log pi
    adj_start = torch.zeros_like(chart.by_start)
    adj_start[0, idx, lengths] = pi * g_root[:, None]

    grad_nn = torch.zeros_like(rules.nn) if need_rules else None         # (Q*Q, Q)
    need_mats = need_rules or need_words  # the per-position matrices' gradients serve both
    # Weighted outer adjoints of the row-vector products, laid out like the chart cells they
    # multiply, so one batched product per kind folds them into per-position matrix gradients.
    adj_np = adj_pn = None
    if need_mats:
        adj_np = torch.zeros_like(chart.by_start[0:N])  # [pos, b, N-w+1]: child (pos-w+1, pos)
        adj_pn = torch.zeros_like(chart.by_start[1:N + 1])  # [pos, b, w-1]: child (pos+1, pos+w)
    grad_pair_mats = None
    adj_term = torch.zeros_like(chart.term)                             # (N, B, T)
    grad_pot = chart.term.new_zeros(B, N + 1, N + 1) if has_pot else None
    min_w = chart.min_width
    for w in range(N, 1, -1):
        P = N - w + 1
        PB = P * B
        weight, peak = saved.weights[w - 2], saved.peaks[w - 2]
        adj = adj_start[0:P, :, w]                                      # (P, B, Q)
        if grad_pot is not None:
            grad_pot[:, 0:P, w] = (adj * chart.by_start[0:P, :, w]).sum(-1).t()
        g = (adj.view(PB, Q) / peak.unsqueeze(-1)).nan_to_num_(nan=0.0)  # d/d raw sum
        lo, hi = min_w, w - min_w
        if hi >= lo:
            K = hi - lo + 1
            _split_adjoints(g, rules.nn,
                            right_children(chart.by_start, w, lo, hi).view(PB, K, Q),
                            chart.by_start[0:P, :, lo:hi + 1].view(PB, K, Q),
                            weight[..., lo - 1:hi].reshape(PB, K, 1), grad_nn,
                            adj_start[0:P, :, lo:hi + 1].view(PB, K, Q),
                            right_children(adj_start, w, lo, hi).view(PB, K, Q))
        if w - 1 >= min_w:
            g_np = (g.view(P, B, Q) * weight[..., w - 2:w - 1])
            mats = saved.right_mats[w - 1:N].view(PB, Q, Q)
            adj_start[0:P, :, w - 1] += torch.bmm(
                g_np.view(PB, 1, Q), mats.transpose(1, 2)).view(P, B, Q)
            if need_mats:
                adj_np[w - 1:N, :, N - w + 1] = g_np
            g_pn = (g.view(P, B, Q) * weight[..., 0:1])
            mats = saved.left_mats[0:P].view(PB, Q, Q)
            adj_start[1:P + 1, :, w - 1] += torch.bmm(
                g_pn.view(PB, 1, Q), mats.transpose(1, 2)).view(P, B, Q)
            if need_mats:
                adj_pn[0:P, :, w - 1] = g_pn
        if w == 2:
            g_pp = (g.view(P, B, Q) * weight[..., 0:1])                 # (P, B, Q)
            mats = saved.pair_mats.view(PB, T, Q)
            adj_term[0:P] += torch.bmm(g_pp.view(PB, 1, Q), mats.transpose(1, 2)).view(P, B, T)
            if need_mats:
                grad_pair_mats = chart.term[0:P].unsqueeze(-1) * g_pp.unsqueeze(-2)  # (P,B,T,Q)

    grad_binary, grad_terminal = None, None
    if need_mats:
        grad_binary, grad_terminal = _rule_and_word_grads(
            binary, chart, rules, adj_np, adj_pn, adj_term, grad_pair_mats, grad_nn,
            need_rules, need_words)
    if adjoints is not None:
        adjoints["chart"] = adj_start
    grad_nt_terminal = None
    if nt_emits:
        adj1 = adj_start[0:N, :, 1]
        grad_nt_terminal = (adj1 * chart.by_start[0:N, :, 1])[..., :NT].transpose(0, 1)
    return grad_root, grad_binary, grad_terminal, grad_nt_terminal, grad_pot


def _rule_and_word_grads(binary, chart: Chart, rules: _Rules, adj_np, adj_pn, adj_term,
                         grad_pair_mats, grad_nn, need_rules: bool, need_words: bool):
    """The rule and preterminal gradients, from the outer adjoints gathered by `_outside`."""
    N1, B, _, Q = chart.by_start.shape
    N = N1 - 1
    T = chart.term.shape[-1]
    NT = binary.shape[-3]
    # Per-position matrix gradients: [pos, b][X, A] = sum over spans of child[X] * g[A].
    grad_right_mats = torch.bmm(
        _by_end(chart.by_start)[0:N].reshape(N * B, N + 1, Q).transpose(1, 2),
        adj_np.view(N * B, N + 1, Q))                                   # (N*B, Q, Q)
    grad_left_mats = torch.bmm(
        chart.by_start[1:N + 1].view(N * B, N + 1, Q).transpose(1, 2),
        adj_pn.view(N * B, N + 1, Q))                                   # (N*B, Q, Q)

    # Fold the per-position matrices back into rules and preterminal cells (per sentence when
    # the rules are: `lead` is () or (B,)).
    lead = binary.shape[:-3]
    per = bool(lead)
    gr = grad_right_mats.view(N, B, Q * Q)
    gl = grad_left_mats.view(N, B, Q * Q)
    gp = None if grad_pair_mats is None else grad_pair_mats.view(N - 1, B, T * Q)
    grad_terminal = None
    if need_words:
        adj_term += _unfold(gr, rules.right) + _unfold(gl, rules.left)
        if gp is not None:
            adj_term[1:N] += _unfold(gp, rules.pair)
        grad_terminal = (adj_term * chart.term).transpose(0, 1)         # (B, N, T)
    if not need_rules:
        return None, grad_terminal
    grad_right = _gather(chart.term, gr, per).view(*lead, T, Q, Q)     # [c, B, A]
    grad_left = _gather(chart.term, gl, per).view(*lead, T, Q, Q)      # [b, C, A]
    if gp is None:
        grad_pair = rules.pair.new_zeros(*lead, T, T, Q)
    else:
        grad_pair = _gather(chart.term[1:], gp, per).view(*lead, T, T, Q)  # [c, b, A]

    grad_rules = torch.empty_like(binary)                              # (..., NT, S, S)
    grad_rules[..., :NT, :NT] = _last3(grad_nn.view(*lead, Q, Q, Q)[..., :NT, :NT, :NT],
                                       (2, 0, 1))
    grad_rules[..., :NT, NT:] = _last3(grad_right[..., :NT, :NT], (2, 1, 0))
    grad_rules[..., NT:, NT:] = _last3(grad_pair[..., :NT], (2, 1, 0))
    grad_rules[..., NT:, :NT] = _last3(grad_left[..., :NT, :NT], (2, 0, 1))
    return grad_rules.mul_(rules.prob), grad_terminal                  # d/d log p = p * d/dp


def _split_adjoints(g: Tensor, nn: Tensor, right: Tensor, left: Tensor, weight: Tensor,
                    grad_nn: Tensor | None, adj_left: Tensor, adj_right: Tensor) -> None:
    """Back through the split sums of one width, in chunks of spans as in the forward.

    g (M, Q) is the adjoint of the product of the split sums with the rules; right and left
    (M, K, Q) the children and weight (M, K, 1) the split weights, as in `_split_products`. Adds
    the rules' gradient to grad_nn (unless it is None) and the children's adjoints to adj_left
    and adj_right (views into the adjoint chart). Each chunk's weighted children and split sums
    are recomputed, and its adjoints added, while they are in cache.
    """
    M, K, Q = right.shape
    chunk = _chunk_rows(Q, nn)
    nn_t = nn.transpose(-1, -2)
    for c0 in range(0, M, chunk):
        c1 = min(M, c0 + chunk)
        weighted = left[c0:c1] * weight[c0:c1]
        if grad_nn is not None:
            sums = torch.bmm(weighted.transpose(1, 2), right[c0:c1]).view(c1 - c0, Q * Q)
        if nn.dim() == 2:
            if grad_nn is not None:
                grad_nn.addmm_(sums.t(), g[c0:c1])
            g_pairs = (g[c0:c1] @ nn_t).view(c1 - c0, Q, Q)            # d/d split sums
        else:  # rules per sentence, as in `_split_products`
            B = nn.shape[0]
            g_b = g[c0:c1].view(-1, B, Q).transpose(0, 1)               # (B, spans, Q)
            if grad_nn is not None:
                s_b = sums.view(-1, B, Q * Q).transpose(0, 1)           # (B, spans, Q*Q)
                grad_nn.baddbmm_(s_b.transpose(1, 2), g_b)
            g_pairs = torch.bmm(g_b, nn_t).transpose(0, 1).reshape(c1 - c0, Q, Q)
        adj_left[c0:c1].addcmul_(torch.bmm(right[c0:c1], g_pairs.transpose(1, 2)), weight[c0:c1])
        adj_right[c0:c1] += torch.bmm(weighted, g_pairs)


def log_partition(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
                  nt_terminal: Tensor | None = None, span_pot: Tensor | None = None) -> Tensor:
    """log Z = log sum over all trees of p(tree, sentence), per sentence, differentiable.

    root        (NT,) or (B, NT)  log p(top symbol)
    binary      (NT, S, S)        log p(A -> B C); children: nonterminals first, then preterminals;
                or (B, NT, S, S)  rules per sentence (compound grammars), one batch all the same
    terminal    (B, N, T)         log p(preterminal -> word at position)
    lengths     (B,) int64        sentence lengths (positions past a length are ignored)
    nt_terminal (B, N, NT)        log p(nonterminal -> word), for grammars in which nonterminals
                                  also emit words (general CNF); None in the induction layout
    span_pot    (B, N+1, N+1)     optional log potential added to every nonterminal cell of span
                                  [start, width] (width >= 2); its gradient is the posterior span
                                  marginal, and -inf forbids a span (partial brackets)

    Sentences with no parse get -inf (and zero gradients), never NaN.
    """
    root, terminal, lengths, nt_terminal = prepare_inputs(root, terminal, lengths, nt_terminal)
    inputs = (root, binary, terminal, nt_terminal, span_pot)
    if torch.is_grad_enabled() and any(x is not None and x.requires_grad for x in inputs):
        return _LogPartition.apply(root, binary, terminal, nt_terminal, span_pot, lengths)
    # No gradient wanted: fill without keeping the backward's state, so that each width's
    # temporaries are freed (and their memory reused) as soon as the next width starts.
    with torch.no_grad():
        chart, _, _ = _fill(binary, terminal, nt_terminal, span_pot, keep=False)
        return _root_scores(chart, root, lengths)[0]


def prepare_inputs(root: Tensor, terminal: Tensor, lengths, nt_terminal: Tensor | None):
    """Check lengths, expand a shared root to (B, NT), and pad the words past each length."""
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
    return root, terminal, lengths, nt_terminal


@dataclass
class SpanTables:
    """Every symbol over every span of a batch: inside and outside scores, scaled, and
    posterior marginals.

    Spans are indexed [start, width] as in `Posteriors.spans`; S = NT + T symbols in the
    engine's layout. The scores are kept as the engine's chart keeps them, each cell divided
    by e^scale: `scaled_inside` * e^scale is the inside score and `scaled_outside` / e^scale
    the outside score over Z, so that their product is the marginal. A decoder that reads a few
    cells (the max-rule-product item pass) takes logarithms of those alone; `inside` and
    `outside` give the whole log tables, made on first use. Cells past a sentence's end are
    zero (-inf in log: zero marginal); so is the outside score of a symbol that no tree puts
    over a span (every cell of a sentence with no parse). The scores are None when they were
    not asked for (`span_tables(log_scores=False)`: a decoder that reads the marginals alone).
    """
    logz: Tensor       # (B,) log p(sentence); -inf when there is no parse
    marginals: Tensor  # (B, N+1, N+1, S) p(symbol spans [start, width] | sentence)
    scaled_inside: Tensor | None = None   # (B, N+1, N+1, S) inside / e^scale (preterminals
                                          # at width one only)
    scaled_outside: Tensor | None = None  # (B, N+1, N+1, NT) outside e^scale / Z
    scale: Tensor | None = None           # (B, N+1, N+1) each cell's log scale

    @property
    def inside(self) -> Tensor | None:
        """(B, N+1, N+1, S) log inside scores; -inf where impossible."""
        if self.scaled_inside is None:
            return None
        if "_log_inside" not in self.__dict__:
            self._log_inside = log_unscaled(self.scaled_inside, self.scale[..., None])
        return self._log_inside

    @property
    def outside(self) -> Tensor | None:
        """(B, N+1, N+1, NT) log outside scores minus log Z, so that outside + inside = log
        p(symbol over span | sentence); -inf where no tree puts the symbol."""
        if self.scaled_outside is None:
            return None
        if "_log_outside" not in self.__dict__:
            self._log_outside = log_unscaled(self.scaled_outside, -self.scale[..., None])
        return self._log_outside

    def rows(self, rows: Tensor) -> "SpanTables":
        """The sentences `rows` of the batch (these tables themselves when `rows` is every
        sentence in order: no copy)."""
        if every_row(rows, len(self.logz)):
            return self
        pick = (lambda x: None if x is None else x[rows])
        return SpanTables(self.logz[rows], self.marginals[rows], pick(self.scaled_inside),
                          pick(self.scaled_outside), pick(self.scale))

    def trimmed(self, cut: int | None) -> "SpanTables":
        """The cells of starts and widths below `cut` (views; these tables when `cut` is None
        or leaves every cell): the whole chart of sentences of at most `cut` - 1 words."""
        if cut is None or cut >= self.marginals.shape[1]:
            return self
        return SpanTables(self.logz, _cells(self.marginals, cut), _cells(self.scaled_inside, cut),
                          _cells(self.scaled_outside, cut), _cells(self.scale, cut))


def _cells(x: Tensor | None, cut: int) -> Tensor | None:
    return None if x is None else x[:, :cut, :cut]


def every_row(rows: Tensor, count: int) -> bool:
    """Whether the index tensor `rows` is 0, 1, ..., count - 1."""
    return len(rows) == count and bool((rows == torch.arange(count)).all())


def past_end(lengths: Tensor, N: int) -> Tensor:
    """(B, N+1, N+1) the cells [start, width] that end past each sentence's length: they hold
    the padding's scores and are no span of it."""
    ends = torch.arange(N + 1)[:, None] + torch.arange(N + 1)[None, :]  # (N+1, N+1)
    return ends[None] > lengths[:, None, None]


def log_unscaled(scaled: Tensor, log_scale: Tensor) -> Tensor:
    """log(scaled) + log_scale, -inf where `scaled` is zero (whatever the scale there)."""
    return torch.where(scaled > 0, scaled.log() + log_scale, NEG_INF)


def span_tables(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
                nt_terminal: Tensor | None = None, log_scores: bool = True,
                span_pot: Tensor | None = None) -> SpanTables:
    """Label marginals, inside and outside scores of every span, batched (arguments as in
    `log_partition`; one grammar for the batch). With `log_scores` False only the marginals
    and log Z are made (inside and outside None). With `span_pot` every score is that of the
    potential-weighted trees, as `log_partition` sums them: -inf on a span leaves out every
    tree that holds it (its marginal is 0, and log Z sums the trees that remain).

    One inside pass and the outside pass of `_LogPartition` (asked for the adjoint chart and
    the word gradient only): a cell's adjoint `adj` is d log Z / d scaled_inside, so
    adj * scaled_inside is the posterior marginal of each symbol over that span, and
    log(adj) - log scale is its log outside score minus log Z (Eisner 2016).
    """
    if binary.dim() != 3:
        raise ValueError("span_tables takes one grammar for the batch, binary (NT, S, S)")
    root, terminal, lengths, nt_terminal = prepare_inputs(root, terminal, lengths, nt_terminal)
    B, N, T = terminal.shape
    NT = binary.shape[0]
    with torch.no_grad():
        chart, saved, rules = _fill(binary, terminal, nt_terminal, span_pot, keep=True)
        logz, top, top_scale, pi, total = _root_scores(chart, root, lengths)
        adjoints: dict = {}
        grad_terminal = _outside(binary, lengths, chart, saved, rules, top, top_scale, pi,
                                 total, nt_terminal is not None, False, torch.ones_like(logz),
                                 need_rules=False, need_words=True, adjoints=adjoints)[2]
        cells = chart.by_start[..., :NT].permute(1, 0, 2, 3)             # (B, N+1, N+1, NT)
        adj = adjoints["chart"][..., :NT].permute(1, 0, 2, 3)
        marginals = terminal.new_zeros(B, N + 1, N + 1, NT + T)
        marginals[..., :NT] = adj * cells
        marginals[:, :N, 1, NT:] = grad_terminal
        if not log_scores:
            return SpanTables(logz, marginals)
        scale = chart.scale_start.transpose(0, 1).contiguous()           # (B, N+1, N+1)
        inside = terminal.new_zeros(B, N + 1, N + 1, NT + T)
        inside[..., :NT] = cells
        inside[:, :N, 1, NT:] = chart.term.transpose(0, 1)
        inside.masked_fill_(past_end(lengths, N)[..., None], 0.0)
        outside = adj.clamp(min=0.0)
    return SpanTables(logz, marginals, inside, outside, scale)
