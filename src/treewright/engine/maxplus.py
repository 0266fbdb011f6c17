"""Matrix products in the max-plus semiring, exactly, mostly over a few columns.

The Viterbi pass (`engine.viterbi`) and the decoders' chart passes (`decode`) take maxima of
sums, max_k values[m, k] + weights[r, k], where the inside pass takes sums of products in a
matrix product. No BLAS kernel does that, and over every column it costs K elementwise sums and
maxima per entry. When each value row is peaked, as the posteriors and word scores of a trained
grammar are, a few of its columns decide every entry: `max_plus` takes each entry over the
largest `TOP_COLUMNS` columns of its row and proves the result exact with two bounds on the
others, one of them a matrix product (BLAS speed); only the entries the bounds leave are taken
over every column.
"""

from __future__ import annotations

import functools

import torch
from torch import Tensor

NEG_INF = float("-inf")

CHUNK = 2 ** 22        # elements of the largest temporary of `max_plus`
BROADCAST = 2 ** 21    # ... of a broadcast over every column (8 MB in float32: faster than 16 MB
                       # on the 2-core machine, at 3.5 billion sums a second)
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


def _by_columns(weights: MaxPlusWeights) -> bool:
    """Whether `_every_column` loops over the columns (R > K) rather than broadcasting."""
    K, R = weights.by_column.shape
    return R > K


def _every_column(own: Tensor, weights: MaxPlusWeights) -> Tensor:
    """(c, R) max over every column k of own[m, k] + weights[r, k]: a broadcast reduced over
    k when rows of weights are long, else K elementwise maxima over (c, R), which ran several
    times faster than a reduction over a short last axis (the word blocks of `engine.viterbi`:
    K = T preterminals, R = NT * S)."""
    K = weights.by_column.shape[0]
    if not _by_columns(weights):
        return (own[:, None, :] + weights.log[None]).amax(-1)
    out = torch.add(weights.by_column[0], own[:, :1])
    for k in range(1, K):
        torch.maximum(out, weights.by_column[k] + own[:, k:k + 1], out=out)
    return out


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
    best = torch.full((M, R), NEG_INF, dtype=values.dtype)
    rows = torch.isfinite(values).any(-1).nonzero().flatten()
    d = min(TOP_COLUMNS if depth is None else depth, K)
    info = torch.finfo(values.dtype)
    rounding, lost = (K + 2) * info.eps, K * info.tiny
    chunk = max(1, CHUNK // (R * max(d, K // 16)))
    # Rows per dense chunk: the broadcast's (c, R, K) temporary, or the loop's (c, R) maxima,
    # which should stay in cache across the K passes.
    dense_chunk = max(1, BROADCAST // (R * (16 if _by_columns(weights) else K)))
    dense = len(rows) * K * R < BOUNDED_FROM or d > CANDIDATE_SHARE * K
    r0 = 0
    while r0 < len(rows):
        if dense:
            at = rows[r0:r0 + dense_chunk]
            best[at] = _every_column(values.index_select(0, at), weights)
            r0 += len(at)
            continue
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
