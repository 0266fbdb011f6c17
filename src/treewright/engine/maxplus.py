"""Matrix products in the max-plus semiring, exactly, mostly over a few columns.

The Viterbi pass (`engine.viterbi`) and the decoders' chart passes (`decode`) take maxima of
sums, max_k values[m, k] + weights[r, k], where the inside pass takes sums of products in a
matrix product. No BLAS kernel does that, and over every column it costs K elementwise sums and
maxima per entry. When each value row is peaked, as the posteriors and word scores of a trained
grammar are, a few of its columns decide every entry: `max_plus` takes each entry over the
largest `TOP_COLUMNS` columns of its row and proves the result exact with two bounds on the
others, one of them a matrix product (BLAS speed); only the entries the bounds leave are taken
over every column. The pass over every column is a loop compiled by numba
(`max_plus_dense`, which the Viterbi pass calls directly: there the bounds saved nothing).
"""

from __future__ import annotations

import functools

import numpy as np
import torch
from torch import Tensor

from treewright.engine.compiled import jit

NEG_INF = float("-inf")

CHUNK = 2 ** 22        # elements of the largest temporary of `max_plus`
TOP_COLUMNS = 24       # candidate columns per value row
DENSE_SHARE = 0.2      # share of entries left unsettled above which `max_plus` goes dense
BOUNDED_FROM = 2 ** 23  # sums over every column (M * K * R) below which `max_plus` takes them
                        # all: the bounds' dozen small operations per chunk cost more
CANDIDATE_SHARE = 0.25  # most candidate columns, as a share of all K, for the bounded mode
PROBE_ROWS = 64        # value rows of the first bounded chunk: flat rows send the rest to the
                       # dense mode after little wasted work


class MaxPlusWeights:
    """The weights of `max_plus`, (R, K) in log space (each at most 0: log-probabilities),
    laid out for its bounds: transposed (columns as rows, for gathering candidates and for the
    loop over columns), and, made when the bounds first need them, each row's maximum and the
    weights in probability space (for the bound by mass)."""

    def __init__(self, weights: Tensor):
        self.log = weights
        self.by_column = weights.t().contiguous()                       # (K, R)

    @functools.cached_property
    def row_max(self) -> Tensor:                                        # (R,)
        return self.log.max(-1).values

    @functools.cached_property
    def prob_t(self) -> Tensor:                                         # (K, R)
        return self.log.exp().t().contiguous()


@functools.cache
def _column_kernel():
    """The compiled loop of `_every_column` (numba, compiled on first use, per dtype)."""
    @jit
    def every_column(values, rows, by_column, out):                    # pragma: no cover
        # Four value rows at a time share each weight column's load; their maxima stay in
        # `acc` (4, R). A column that is -inf in all four changes no maximum and is skipped.
        # The four updates are written out: as a loop over the four rows the same kernel ran
        # 5 to 8 times slower at R = 20 (2026-12-05).
        K, R = by_column.shape
        n = len(rows)
        acc = np.empty((4, R), dtype=out.dtype)
        for g in range(0, n, 4):
            m0, m1, m2, m3 = rows[g], rows[min(g + 1, n - 1)], rows[min(g + 2, n - 1)], \
                rows[min(g + 3, n - 1)]        # past the last row, the last again
            acc[:] = -np.inf
            for k in range(K):
                a0, a1, a2, a3 = values[m0, k], values[m1, k], values[m2, k], values[m3, k]
                if a0 == -np.inf and a1 == -np.inf and a2 == -np.inf and a3 == -np.inf:
                    continue
                w = by_column[k]
                for r in range(R):
                    x = w[r]
                    s = a0 + x
                    if s > acc[0, r]:
                        acc[0, r] = s
                    s = a1 + x
                    if s > acc[1, r]:
                        acc[1, r] = s
                    s = a2 + x
                    if s > acc[2, r]:
                        acc[2, r] = s
                    s = a3 + x
                    if s > acc[3, r]:
                        acc[3, r] = s
            for j in range(min(4, n - g)):
                out[rows[g + j]] = acc[j]
    return every_column


def _every_column(values: Tensor, rows: Tensor, weights: MaxPlusWeights, out: Tensor) -> None:
    """out[m, r] = max over every column k of values[m, k] + weights[r, k], for each m in
    `rows`: K elementwise maxima over each row of `out`, in a compiled loop (numba) that keeps
    the rows' maxima in cache. The float sums are those of the broadcast
    (values[m, k] + weights[r, k], the same order), so the maxima are bitwise the same."""
    _column_kernel()(values.detach().contiguous().numpy(), rows.numpy(),
                     weights.by_column.detach().numpy(), out.numpy())


def _same_dtype(values: Tensor, weights: MaxPlusWeights) -> None:
    if values.dtype != weights.log.dtype:
        raise ValueError(f"max_plus: values are {values.dtype} and weights "
                         f"{weights.log.dtype}; give both in one dtype")


def max_plus_dense(values: Tensor, weights: MaxPlusWeights) -> Tensor:
    """`max_plus` over every column of every row (rows -inf throughout give -inf), with no
    bounds: the compiled loop alone. On tabular grammars' Viterbi passes (20/30 to 100/200
    symbols, random and EM-trained) it was as fast as the bounds or faster (2026-12-05: 1.04
    against 1.85 s at 60/120, 3.45 against 3.63 s at 100/200), the same bits either way."""
    _same_dtype(values, weights)
    best = torch.full((values.shape[0], weights.log.shape[0]), NEG_INF, dtype=values.dtype)
    _every_column(values, torch.isfinite(values).any(-1).nonzero().flatten(), weights, best)
    return best


def max_plus(values: Tensor, weights: MaxPlusWeights, depth: int | None = None) -> Tensor:
    """(M, R) max_k values[m, k] + weights[r, k], for `values` (M, K) and `weights` (R, K),
    weights at most 0 (log-probabilities): a matrix product in the max-plus semiring, exactly,
    but mostly over the `depth` (default `TOP_COLUMNS`) largest columns of each value row. Rows
    of `values` that are -inf throughout give -inf without being computed. Each entry is the
    float sum of one value and one weight, so the column that gives it is found again by
    comparing the same sums (as the callers' backtraces do for the few entries a tree uses).

    Two bounds on every other column k of an entry (m, r): values[m, k] + weights[r, k] is at
    most the value row's (d+1)-th largest plus the weight row's largest (the threshold test of
    Fagin, Lotem & Naor 2003, "Optimal aggregation algorithms for middleware", at depth d on
    one side), and at most the log of the sum of exp(values[m, k] + weights[r, k]) over all
    such k (the mass left out: one matrix product over every column, each value row shifted by
    its maximum, with the candidates' columns set to zero; with room for the product's
    rounding, at most (K + 2) units of the last place of the sum, and for terms that underflow,
    each below the dtype's smallest normal number). Where the best candidate is above the
    lower bound, it is the maximum; the entries where it is not are computed over every column
    (every entry of a chunk of rows, and of the rows after it, once more than `DENSE_SHARE` of
    its entries are left: flat rows, where the candidates save nothing). The first chunk is a
    probe of `PROBE_ROWS` rows, so that flat rows waste little on the bounds. Products of
    fewer than `BOUNDED_FROM` sums, and those whose candidates would be more than
    `CANDIDATE_SHARE` of the columns (a 20/30 grammar's word blocks: 24 of 30 preterminals),
    take every column at once: there the bounds cost more than they save. Temporaries in
    chunks of at most `CHUNK` elements."""
    M, R = values.shape[0], weights.log.shape[0]
    K = values.shape[1]
    _same_dtype(values, weights)
    best = torch.full((M, R), NEG_INF, dtype=values.dtype)
    rows = torch.isfinite(values).any(-1).nonzero().flatten()
    d = min(TOP_COLUMNS if depth is None else depth, K)
    info = torch.finfo(values.dtype)
    rounding, lost = (K + 2) * info.eps, K * info.tiny
    chunk = max(1, CHUNK // (R * max(d, K // 16)))
    dense = len(rows) * K * R < BOUNDED_FROM or d > CANDIDATE_SHARE * K
    r0 = 0
    while r0 < len(rows):
        if dense:
            _every_column(values, rows[r0:], weights, best)
            break
        at = rows[r0:r0 + (min(chunk, PROBE_ROWS) if r0 == 0 else chunk)]
        r0 += len(at)
        own = values.index_select(0, at)                                # (c, K)
        v_top, v_at = own.topk(min(d + 1, K), -1)
        v_next = v_top[:, d] if d < K else torch.full_like(v_top[:, 0], NEG_INF)
        shift = v_top[:, :1]
        value = weights.by_column.index_select(0, v_at[:, 0]) + v_top[:, :1]    # (c, R)
        for j in range(1, d):
            value = torch.maximum(value, weights.by_column.index_select(0, v_at[:, j]) +
                                  v_top[:, j:j + 1])
        best[at] = value
        threshold = v_next[:, None] + weights.row_max[None, :]
        left_out = (own - shift).exp().scatter_(1, v_at[:, :d], 0.0)    # (c, K)
        rest = left_out @ weights.prob_t                                # (c, R)
        rest = rest + rounding * rest + lost
        room = 8 * info.eps * (shift.abs() + value.abs() + 1)     # the sums' and log's rounding
        mass = rest.log() + shift + room
        settled = (value > torch.minimum(threshold, mass)) | torch.isneginf(threshold)
        rm, rr = (~settled).nonzero().unbind(1)
        if len(rm) > DENSE_SHARE * value.numel():
            dense = True
            r0 -= len(at)
            continue
        step = max(1, CHUNK // (4 * K))
        for f0 in range(0, len(rm), step):
            fm, fr = rm[f0:f0 + step], rr[f0:f0 + step]
            best[at[fm], fr] = (own.index_select(0, fm) +
                                weights.log.index_select(0, fr)).amax(-1)
    return best
