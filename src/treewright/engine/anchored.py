"""The best derivation over anchored coarse rules, for max-rule-product decoding, in compiled
loops: over the labeled spans a decoder keeps (`best_derivations`), over a whole chart width
(`best_splits`), and the bounds that choose which labeled spans to keep (`tree_bounds`).

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
reads the fine rules in place and keeps only each item's best.
"""

from __future__ import annotations

import functools

import numpy as np
import torch
from torch import Tensor

from treewright.engine.compiled import jit


def best_derivations(binary: Tensor | None, slots: Tensor | None, parent: Tensor,
                     parent_max: Tensor, inside: Tensor, inside_max: Tensor, log_mu: Tensor,
                     ib: Tensor, ii: Tensor, iw: Tensor, ik: Tensor, cell_first: Tensor,
                     cell_count: Tensor, parents: Tensor, best: Tensor,
                     log_q: Tensor | None = None, slack: float = 1e-6) -> Tensor:
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

    A parent's anchored rules are ordered split by split (left child's width 1 first), then by
    left item, then right item; its best is the first rule in that order with the largest
    log q + best(left) + best(right), where log q = log(sum over a, b, c of
    parent[p, a] binary[s(x, a), s(y, b), s(z, c)] inside[l, b] inside[r, c]) + parent_max[p]
    + inside_max[l] + inside_max[r], the sums over a, then c, then b, each in order, s(k, g) =
    slots[k, g] the fine symbol in slot g of coarse symbol k. binary (NT, S, S) are the fine
    rules' probabilities (`decode.CoarseLayout.binary`) and slots (K, G) the subcategory slots
    (`decode.CoarseLayout.slots`: each coarse symbol's fine symbols in increasing order, then
    S); without them (factored rules), `log_q` gives every anchored rule's log q in that order.

    Some work is left out without changing any result. Only a coarse symbol's own
    subcategories are visited (a parent's nonterminal ones: the fine rules have nonterminal
    parents), and a zero score among them is skipped with its terms, which add nothing to any
    sum. A rule posterior is at most
    the marginal of each of its three labels and every best is at most 0, so a rule whose
    min(log_mu) + best(left) + best(right) is below the parent's best so far by at least
    `slack` (room for rounding) cannot pass it or tie it: its q is not computed. Within a split
    the loop visits each child cell's items by their best, highest first, so that the rules
    likely to win come first and, once a left item's (or a right item's) bound falls that far
    below, so do those of every item after it in its cell, which are all left at once. Ties are
    still settled by the order above.
    """
    if (binary is None or slots is None) and log_q is None:
        raise ValueError("best_derivations needs the rules and their slots or every rule's "
                         "log q")
    dtype = inside.dtype
    if binary is None or slots is None:
        binary, slots = torch.zeros((1, 1, 1), dtype=dtype), torch.zeros((1, 1), dtype=torch.long)
    if log_q is None:
        log_q = torch.zeros(0, dtype=dtype)
    if not best.is_contiguous():
        raise ValueError("best must be contiguous: it is written in place")
    counts, parent_counts = subcategory_counts(slots, binary.shape[0], binary.shape[1])
    back = np.full((len(best), 2), -1, dtype=np.int64)
    arrays = [x.contiguous().numpy() for x in (binary, slots, counts, parent_counts, parent,
                                               parent_max, inside, inside_max, log_mu, ib, ii,
                                               iw, ik, cell_first, cell_count, parents)]
    _kernel()(*arrays, log_q.contiguous().numpy(), float(slack), best.numpy(), back)
    return torch.from_numpy(back)


def subcategory_counts(slots: Tensor, nt: int, symbols: int) -> tuple[Tensor, Tensor]:
    """(K,) each coarse symbol's number of subcategories and (K,) of nonterminal ones, from its
    subcategory slots (K, G): fine indices in increasing order (the `nt` nonterminals first),
    then `symbols` (one past the last) in unused slots."""
    return (slots < symbols).sum(1), (slots < nt).sum(1)


@functools.cache
def _kernel():
    """The compiled loop of `best_derivations` (numba, compiled on first use, per dtype)."""
    @jit
    def derive(binary, slots, counts, parent_counts, parent, parent_max, inside, inside_max,
               log_mu, ib, ii, iw, ik, cell_first, cell_count, parents, log_q, slack, best,
               back):
        # pragma: no cover
        by_rule = log_q.shape[0] > 0
        B, N1 = cell_first.shape[0], cell_first.shape[1]
        # Each cell's items by best score, highest first (symbol order among equals), made for
        # a width once all its parents are done: a child's best is final when it is read.
        order = np.arange(best.shape[0])
        ordered = 0                                   # widths 1..ordered are in order
        base = 0                      # the next split's first rule in `log_q`'s order
        for p in range(parents.shape[0]):
            item = parents[p]
            b, i, w, x = ib[item], ii[item], iw[item], ik[item]
            while ordered < w - 1:
                ordered += 1
                for bb in range(B):
                    for s in range(N1):
                        first, count = cell_first[bb, s, ordered], cell_count[bb, s, ordered]
                        if count > 1:
                            by_best = np.argsort(-best[first:first + count], kind="mergesort")
                            for t in range(count):
                                order[first + t] = first + by_best[t]
            top, left_best, right_best, split_best = -np.inf, -1, -1, 0
            mu_x = log_mu[item]
            for u in range(1, w):
                l0, nl = cell_first[b, i, u], cell_count[b, i, u]
                r0, nr = cell_first[b, i + u, w - u], cell_count[b, i + u, w - u]
                if nl == 0 or nr == 0:
                    continue
                right_top = best[order[r0]]
                for t in range(nl):
                    lft = order[l0 + t]
                    best_l = best[lft]
                    # A rule's q is at most each of its three labels' marginals and every
                    # best is at most 0, so no rule of this left item or of a later one (lower
                    # best) can pass the best so far: they are left (bitwise the same result).
                    cap = mu_x + best_l + right_top
                    if cap < top and cap + slack <= top:
                        break
                    cap_l = min(mu_x, log_mu[lft]) + best_l
                    for c in range(nr):
                        rgt = order[r0 + c]
                        best_r = best[rgt]
                        bound = cap_l + best_r
                        if bound < top and bound + slack <= top:
                            break                     # nor can a later right item
                        bound = min(bound, log_mu[rgt] + best_l + best_r)
                        if bound < top and bound + slack <= top:
                            continue
                        if by_rule:
                            lq = log_q[base + (lft - l0) * nr + (rgt - r0)]
                        else:
                            y, z = ik[lft], ik[rgt]
                            total = 0.0
                            for bb in range(counts[y]):
                                in_b = inside[lft, bb]
                                if in_b == 0.0:
                                    continue
                                fb = slots[y, bb]
                                s = 0.0
                                for c3 in range(counts[z]):
                                    in_c = inside[rgt, c3]
                                    if in_c == 0.0:
                                        continue
                                    fc = slots[z, c3]
                                    over_a = 0.0
                                    for a in range(parent_counts[x]):
                                        o = parent[p, a]
                                        if o != 0.0:
                                            over_a += o * binary[slots[x, a], fb, fc]
                                    s += over_a * in_c
                                total += in_b * s
                            lq = np.log(total) + parent_max[p] + inside_max[lft] + \
                                inside_max[rgt]
                        score = lq + best_l + best_r
                        # Ties go to the first rule in (split, left item, right item) order,
                        # whatever order the rules are visited in.
                        if left_best < 0 or score > top or score == top and (
                                u < split_best or u == split_best and (
                                    lft < left_best or lft == left_best and rgt < right_best)):
                            top, left_best, right_best, split_best = score, lft, rgt, u
                base += nl * nr
            best[item] = top
            back[item, 0], back[item, 1] = left_best, right_best
    return derive


def best_splits(rules: Tensor, parent: Tensor, child: Tensor, child_scale: Tensor, rows: Tensor,
                parents: Tensor | None, width: int, num_parents: int, value: Tensor,
                arg: Tensor) -> None:
    """One width of max-rule-product's chart pass over a refined grammar
    (`decode._max_rule_product_refined`): for each (span, coarse parent x) asked for, the best
    split u and children (y, z) by s(x, y, z) = sum over a, b, c of
    parent[r, x, a] p(x_a -> y_b z_c) L[b, y] R[c, z], L and R the child cells (u on the left,
    width - u on the right), and its log score log s + the two cells' log scales.

    rules (Kp, G, G*K*G*K): p(x_a -> y_b z_c) at [x, a, (c, y, b, z)] (`decode.CoarseLayout.
    rules`). parent (rows, Kp, G): the spans' outside scores, scaled. child (B, N+1, N+1, G, K)
    and child_scale (B, N+1, N+1): each cell's scores by subcategory slot and coarse symbol,
    scaled, and the log scale. Spans are rows r = sentence * P + start, P = N + 1 - width.
    rows (m,) and parents (m,): the (span, parent) pairs to do, or every parent of each row when
    parents is None. value (rows, Kp) and arg (rows, Kp, 3) (split, y, z) are written for them.
    A child of two or more words is a coarse parent (symbols below Kp), so only a word child at
    a span's edge ranges over all K symbols. Ties go to the first split, then the first (y, z),
    y first.

    The parent's outside is folded into its rules once per span (the sums over a), then each
    split's sums over c and b run over the children's symbols z in the innermost loop.
    """
    xs = torch.full((len(rows),), -1, dtype=torch.long) if parents is None else parents
    P = child.shape[1] - width
    _width_kernel()(rules.numpy(), parent.contiguous().numpy(), child.numpy(),
                    child_scale.numpy(), rows.contiguous().numpy(), xs.contiguous().numpy(), P,
                    width, num_parents, value.numpy(), arg.numpy())


@functools.cache
def _width_kernel():
    """The compiled loop of `best_splits` (numba, compiled on first use, per dtype)."""
    @jit
    def splits(rules, parent, child, child_scale, rows, xs, P, w, Kp, value, arg):
        # pragma: no cover
        G, K = child.shape[3], child.shape[4]
        folded = np.empty(G * K * G * K, dtype=child.dtype)
        acc = np.empty(K, dtype=child.dtype)
        for item in range(rows.shape[0]):
            r = rows[item]
            sb, si = r // P, r % P
            x0, x1 = (0, Kp) if xs[item] < 0 else (xs[item], xs[item] + 1)
            for x in range(x0, x1):
                # The outside folded in, [c, y, b, z]: two word children (y and z both past
                # Kp) only where the span is two words.
                first = True
                for a in range(G):
                    o = parent[r, x, a]
                    if o == 0.0:
                        continue
                    ra = rules[x, a]
                    for c in range(G):
                        for y in range(K):
                            kz = K if y < Kp or w == 2 else Kp
                            for b in range(G):
                                at = ((c * K + y) * G + b) * K
                                if first:
                                    for z in range(kz):
                                        folded[at + z] = o * ra[at + z]
                                else:
                                    for z in range(kz):
                                        folded[at + z] += o * ra[at + z]
                    first = False
                if first:                               # no outside score: every sum is 0
                    folded[:] = 0.0
                best, bu, by, bz = -np.inf, 0, 0, 0
                for u in range(1, w):
                    ky = K if u == 1 else Kp
                    kz = K if u == w - 1 else Kp
                    left, right = child[sb, si, u], child[sb, si + u, w - u]   # (G, K)
                    top, ty, tz = -1.0, 0, 0
                    for y in range(ky):
                        acc[:kz] = 0.0
                        for b in range(G):
                            lb = left[b, y]
                            if lb == 0.0:
                                continue
                            for c in range(G):
                                at = ((c * K + y) * G + b) * K
                                rc = right[c]
                                for z in range(kz):
                                    acc[z] += lb * folded[at + z] * rc[z]
                        for z in range(kz):
                            if acc[z] > top:
                                top, ty, tz = acc[z], y, z
                    score = np.log(top) + child_scale[sb, si, u] + \
                        child_scale[sb, si + u, w - u]
                    if u == 1 or score > best:
                        best, bu, by, bz = score, u, ty, tz
                value[r, x] = best
                arg[r, x, 0], arg[r, x, 1], arg[r, x, 2] = bu, by, bz
    return splits


def tree_bounds(coarse_log: Tensor, lengths: Tensor, num_parents: int, slack: float) -> Tensor:
    """(B, N+1, N+1, K) for every labeled span (start, width, coarse symbol), an upper bound on
    the log max-rule-product score of any tree that holds it, plus `slack`; -inf where no tree
    can. `coarse_log` (B, N+1, N+1, K): the coarse labels' log marginals mu (a word's labels
    at width one; over two or more words only the first `num_parents` symbols, the coarse
    parents, can be labels).

    A tree's score multiplies its binary nodes' anchored rule posteriors q, each word's label
    posterior and the top label's posterior. Each is a posterior probability, so q(x -> y z) is
    at most each of mu(x) over the parent's span, mu(y) and mu(z) over the children's (a rule
    used there implies all three labeled spans). So a binary node is bounded by the least of
    its three spans' bounds: the labeled span's own mu, u = the largest mu over the span's
    labels for the others. The best product of those bounds over the trees holding a labeled
    span is an unlabeled max-semiring pass, inside and outside (an admissible estimate in the
    sense of A* parsing: Klein & Manning 2003, "A* Parsing: Fast Exact Viterbi Parse
    Selection"), in which the labeled span's mu enters two factors: its own node's and its
    parent's (or the top label's). One loop per sentence: O(n^3) for the unlabeled pass and
    O(K n^3) for the labels, each label's two factors maximized over its splits and its
    parents."""
    out = torch.empty_like(coarse_log)
    _bound_kernel()(coarse_log.contiguous().numpy(), lengths.to(torch.long).numpy(),
                    num_parents, slack, out.numpy())
    return out


@functools.cache
def _bound_kernel():
    """The compiled loop of `tree_bounds` (numba, compiled on first use, per dtype)."""
    @jit
    def _range(fac, rest, a, b):  # pragma: no cover
        """Over entries a..b-1: the least and largest bound, the best rest, and the best bound
        plus rest (all -inf when there are none)."""
        lo, hi, r, c = np.inf, -np.inf, -np.inf, -np.inf
        for s in range(a, b):
            lo, hi = min(lo, fac[s]), max(hi, fac[s])
            r, c = max(r, rest[s]), max(c, fac[s] + rest[s])
        if a == b:
            lo = -np.inf
        return lo, hi, r, c

    @jit
    def _best(m, fac, rest, a, b, lo, hi, r, c):  # pragma: no cover
        """The largest min(m, fac) + rest over entries a..b-1, given their `_range`: m + the
        best rest when m is at most every bound, the best bound plus rest when at least."""
        if m <= lo:
            return m + r
        if m >= hi:
            return c
        best = -np.inf
        for s in range(a, b):
            best = max(best, min(m, fac[s]) + rest[s])
        return best

    @jit
    def bounds(cl, lengths, Kp, slack, out):  # pragma: no cover
        B, N1, _, K = cl.shape
        neg = -np.inf
        out[:] = neg
        u = np.empty((N1, N1), dtype=cl.dtype)      # the best label's mu, [start, width]
        ins = np.empty((N1, N1), dtype=cl.dtype)    # best product inside a span, its node in
        outs = np.empty((N1, N1), dtype=cl.dtype)   # ... around it, its parent's node in
        fac = np.empty(2 * N1, dtype=cl.dtype)      # a cell's per-split (or per-parent) bound
        rest = np.empty(2 * N1, dtype=cl.dtype)     # ... and what the rest adds to it
        for sb in range(B):
            n = lengths[sb]
            if n == 0:
                continue
            u[:] = neg
            ins[:] = neg
            outs[:] = neg
            words = 0.0
            for i in range(n):
                best = neg
                for x in range(K):
                    best = max(best, cl[sb, i, 1, x])
                u[i, 1] = best
                ins[i, 1] = 0.0
                words += best
            for w in range(2, n + 1):
                for i in range(n - w + 1):
                    best = neg
                    for x in range(Kp):
                        best = max(best, cl[sb, i, w, x])
                    u[i, w] = best
            if words == neg:
                continue
            for w in range(2, n + 1):
                for i in range(n - w + 1):
                    best = neg
                    for k in range(1, w):
                        v = min(u[i, w], u[i, k], u[i + k, w - k]) + ins[i, k] + \
                            ins[i + k, w - k]
                        best = max(best, v)
                    ins[i, w] = best
            outs[0, n] = u[0, n]                    # the top label's posterior
            for w in range(n - 1, 0, -1):
                for i in range(n - w + 1):
                    best = neg
                    for W in range(w + 1, n + 1):
                        if i + W <= n:              # left child of (i, W)
                            v = outs[i, W] + min(u[i, W], u[i, w], u[i + w, W - w]) + \
                                ins[i + w, W - w]
                            best = max(best, v)
                        p = i - (W - w)
                        if p >= 0:                  # right child of (p, W)
                            v = outs[p, W] + min(u[p, W], u[p, W - w], u[i, w]) + \
                                ins[p, W - w]
                            best = max(best, v)
                    outs[i, w] = best
            for w in range(1, n + 1):
                for i in range(n - w + 1):
                    # Own node: per split, the children's bound and their insides.
                    ns = 0
                    for k in range(1, w):
                        fac[ns] = min(u[i, k], u[i + k, w - k])
                        rest[ns] = ins[i, k] + ins[i + k, w - k]
                        ns += 1
                    # Parent's node: per parent, its and the sibling's bound, and the rest.
                    no = ns
                    for W in range(w + 1, n + 1):
                        if i + W <= n:
                            fac[no] = min(u[i, W], u[i + w, W - w])
                            rest[no] = outs[i, W] + ins[i + w, W - w]
                            no += 1
                        p = i - (W - w)
                        if p >= 0:
                            fac[no] = min(u[p, W], u[p, W - w])
                            rest[no] = outs[p, W] + ins[p, W - w]
                            no += 1
                    # A label whose mu is at most every split's (parent's) bound adds it to
                    # the best rest; one at least as high as all of them adds nothing of its
                    # own. Only the labels between (few, on a trained grammar) walk the list
                    # (`_best`).
                    lo_own, hi_own, r_own, c_own = _range(fac, rest, 0, ns)
                    lo_up, hi_up, r_up, c_up = _range(fac, rest, ns, no)
                    top = i == 0 and w == n
                    kx = K if w == 1 else Kp
                    base = words + slack
                    if w == 1:
                        base -= u[i, 1]
                    for x in range(kx):
                        m = cl[sb, i, w, x]
                        if m == neg:
                            continue
                        own = m if w == 1 else \
                            _best(m, fac, rest, 0, ns, lo_own, hi_own, r_own, c_own)
                        above = _best(m, fac, rest, ns, no, lo_up, hi_up, r_up, c_up)
                        if top:                         # the top label's posterior
                            above = max(above, m)
                        out[sb, i, w, x] = own + above + base
    return bounds
