"""The best derivation over anchored coarse rules, for max-rule-product decoding, in a
compiled loop.

Max-rule-product decoding of a refined grammar (Petrov & Klein 2007, "Improved Inference for
Unlexicalized Parsing", section 3) weighs anchored coarse rules: parent x over a span, a split
point, children y and z. Each rule's posterior q is a sum over the subcategories (a, b, c) of
x, y and z of O(x_a) p(x_a -> y_b z_c) I(y_b) I(z_c), O the parent's outside score over the
sentence's probability and I the children's inside scores; a tree's score multiplies q over
its nodes. Over the labeled spans a decoder keeps ("items"), the best tree is a recursion
from narrow items to wide ones: best(parent) = max over its anchored rules of
log q + best(left) + best(right). There can be millions of anchored rules in a batch. As tensor
operations each one needed its index triple listed and its G**3 rule block gathered into new
arrays (about a microsecond a rule at G = 4 subcategory slots); this loop takes them one by one,
reads the rule blocks in place and keeps only each item's best.
"""

from __future__ import annotations

import functools

import numpy as np
import torch
from torch import Tensor

from treewright.engine.compiled import jit


def best_derivations(blocks: Tensor | None, parent: Tensor, parent_max: Tensor,
                     inside: Tensor, inside_max: Tensor, log_mu: Tensor, ib: Tensor,
                     ii: Tensor, iw: Tensor, ik: Tensor, cell_first: Tensor, cell_count: Tensor,
                     parents: Tensor, best: Tensor, log_q: Tensor | None = None,
                     slack: float = 1e-6) -> Tensor:
    """Fills `best` (items,) for the parent items and returns each item's best rule's
    children, (items, 2) long: left and right item (-1 for a word, or a parent with no rule).

    Items are labeled spans (sentence ib, start ii, width iw, coarse symbol ik), listed so that
    each cell's items are consecutive, in symbol order: cell_first and cell_count (B, N+1, N+1)
    give each cell's first item and its number. `best` holds the words' scores on entry (it is
    written in place; the parents' entries are overwritten). `parents` lists the items of two
    or more words, narrower ones first; parent (P, G) and parent_max (P,) are their outside
    scores over the subcategory slots, scaled as `decode._rescaled` scales them (row p of them
    belongs to item parents[p]); inside (items, G) and inside_max (items,) every item's inside
    scores, the same way; log_mu (items,) each item's log label marginal.

    A parent's anchored rules are taken split by split (left child's width 1 first), then left
    item, then right item; its best is the first rule with the largest
    log q + best(left) + best(right), where log q = log(sum over a, b, c of
    parent[p, a] blocks[x, y, z, (a, b, c)] inside[l, b] inside[r, c]) + parent_max[p] +
    inside_max[l] + inside_max[r], the sums over a, then c, then b, each in order. blocks
    (Kp, K, K, G**3) are the rules by coarse rule (`decode.CoarseLayout.blocks`); without them
    (factored rules), `log_q` gives every anchored rule's log q in that order.

    Two things are left out without changing any result. A zero score (an unused slot: a
    symbol with fewer than G subcategories) is skipped with its terms, which add nothing to any
    sum, so most of a rule block is never read where few symbols are split. And a rule posterior
    is at most the marginal of each of its three labels, so a rule whose
    min(log_mu) + best(left) + best(right) is at least `slack` (room for rounding) below the
    parent's best so far cannot pass it: its q is not computed.
    """
    if blocks is None and log_q is None:
        raise ValueError("best_derivations needs the rule blocks or every rule's log q")
    dtype = inside.dtype
    if blocks is None:
        blocks = torch.zeros((1, 1, 1, 1), dtype=dtype)
    if log_q is None:
        log_q = torch.zeros(0, dtype=dtype)
    if not best.is_contiguous():
        raise ValueError("best must be contiguous: it is written in place")
    back = np.full((len(best), 2), -1, dtype=np.int64)
    arrays = [x.contiguous().numpy() for x in (blocks, parent, parent_max, inside, inside_max,
                                               log_mu, ib, ii, iw, ik, cell_first, cell_count,
                                               parents)]
    _kernel()(*arrays, log_q.contiguous().numpy(), float(slack), best.numpy(), back)
    return torch.from_numpy(back)


@functools.cache
def _kernel():
    """The compiled loop of `best_derivations` (numba, compiled on first use, per dtype)."""
    @jit
    def derive(blocks, parent, parent_max, inside, inside_max, log_mu, ib, ii, iw, ik,
               cell_first, cell_count, parents, log_q, slack, best, back):
        # pragma: no cover
        G = inside.shape[1]
        GG = G * G
        by_rule = log_q.shape[0] > 0
        r = 0
        for p in range(parents.shape[0]):
            item = parents[p]
            b, i, w, x = ib[item], ii[item], iw[item], ik[item]
            top, left_best, right_best = -np.inf, -1, -1
            mu_x = log_mu[item]
            for u in range(1, w):
                l0, l1 = cell_first[b, i, u], cell_first[b, i, u] + cell_count[b, i, u]
                r0 = cell_first[b, i + u, w - u]
                r1 = r0 + cell_count[b, i + u, w - u]
                for lft in range(l0, l1):
                    for rgt in range(r0, r1):
                        # q is at most each of its three labels' marginals: a rule that
                        # cannot pass the best so far is left (bitwise the same result).
                        if left_best >= 0 and min(mu_x, log_mu[lft], log_mu[rgt]) + \
                                best[lft] + best[rgt] + slack <= top:
                            if by_rule:
                                r += 1
                            continue
                        if by_rule:
                            lq = log_q[r]
                            r += 1
                        else:
                            block = blocks[x, ik[lft], ik[rgt]]
                            total = 0.0
                            for bb in range(G):
                                in_b = inside[lft, bb]
                                if in_b == 0.0:
                                    continue
                                s = 0.0
                                for c in range(G):
                                    in_c = inside[rgt, c]
                                    if in_c == 0.0:
                                        continue
                                    over_a = 0.0
                                    for a in range(G):
                                        o = parent[p, a]
                                        if o != 0.0:
                                            over_a += o * block[a * GG + bb * G + c]
                                    s += over_a * in_c
                                total += in_b * s
                            lq = np.log(total) + parent_max[p] + inside_max[lft] + \
                                inside_max[rgt]
                        score = lq + best[lft] + best[rgt]
                        if left_best < 0 or score > top:
                            top, left_best, right_best = score, lft, rgt
            best[item] = top
            back[item, 0], back[item, 1] = left_best, right_best
    return derive
