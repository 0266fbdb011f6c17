"""The inside pass in the max semiring (Viterbi), and the best trees.

Same chart and child blocks as `engine.inside` (nonterminal pairs, a preterminal on the right,
on the left, both), but in log space with max in place of sum. The forward keeps each cell's
best score and which block gave it; the split and children that won are found again, from the
same float sums, for the nodes of the best trees only (`_backtrace`). Decoding does not need
the matrix-product speed of the sum semiring; it needs the exact best tree. A max has no BLAS
kernel, so the forward is a loop compiled by numba (`_width_kernel`) and the word blocks'
maxima are max-plus products (`engine.maxplus`).

Shapes: B sentences, N longest length, P = N - w + 1 spans of width w, NT nonterminals,
T preterminals. Child indices follow the engine's layout: c < NT nonterminal, else preterminal
c - NT.
"""

from __future__ import annotations

import functools
import math

import numpy as np
import torch
from torch import Tensor

from treewright.engine.compiled import jit
from treewright.engine.maxplus import MaxPlusWeights, max_plus_dense

NEG_INF = float("-inf")


def _best_of_word(term: Tensor, rules: Tensor) -> Tensor:
    """For every word position, max over the word's preterminal z of rules[x, y, z] + term[z].

    term: (B, N, T) word scores, rules: (NT, Y, T) -> (B, N, NT, Y). A block with a word child
    scores the same word at every span that ends (or starts) there, so the max over its
    preterminal is taken once per position rather than once per span: the per-span work of the
    block drops from NT * Y * T to NT * Y. The max is a max-plus product of the word scores
    with the rules (`engine.maxplus.max_plus_dense`); which
    preterminal won is found again for the few words of the best trees (`_backtrace`).
    """
    Bt, N, T = term.shape
    weights = MaxPlusWeights(rules.reshape(-1, T))                      # (NT * Y, T)
    return max_plus_dense(term.reshape(Bt * N, T), weights).view(Bt, N, *rules.shape[:2])


def viterbi(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
            nt_terminal: Tensor | None = None, span_pot: Tensor | None = None,
            span_prob: Tensor | None = None
            ) -> list[tuple[float, list[tuple[int, int, int]]] | None]:
    """The most probable tree of each sentence (arguments as in `engine.inside.log_partition`;
    here `span_pot` may also be given per nonterminal, (B, N+1, N+1, C), a log potential added
    to each nonterminal's score over each span of width >= 2, nonterminal x reading column x
    (C >= NT: columns past NT are not read); or `span_prob`, of the same shapes, probabilities
    whose logarithms are added, taken for the cells within the sentences alone).

    Returns per sentence (log-probability, spans) with spans (start, end, symbol) in pre-order,
    one-word spans included, or None when the sentence has no parse.

    Blocks with a word child take the max over the word's preterminal once per word position
    (`_best_of_word`), then per span only the max over the other child's symbol. Ties go to
    the first block (two nonterminals, a word on the right, on the left, two words), then the
    first split, then the lowest-numbered children: the left child first for two nonterminals
    or two words, the nonterminal child first beside a word.
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
        # The pair rules by column, (NT * NT, NT): rules_t[y * NT + z, x] = rule x -> y z.
        rules_t = binary[:, :NT, :NT].reshape(NT, NT * NT).t().contiguous()
        min_w = 1 if nt_terminal is not None else 2
        term = terminal                                            # (B, N, T)
        right_best = left_best = None
        if T:
            # right_best[b, p, x, y]: the best of x -> y z over the preterminal z of word p
            # (y any symbol: a nonterminal, or a preterminal for the two-word block);
            # left_best[b, p, x, z]: the best of x -> y z over the preterminal y of word p.
            right_best = _best_of_word(term, binary[:, :, NT:])
            left_best = _best_of_word(term, binary[:, NT:, :NT].transpose(1, 2))
        # chart[w]: (B, N, NT) best log score of each nonterminal over each span of width w
        # (the first N - w + 1 starts used).
        chart = terminal.new_full((N + 1, B, N, NT), NEG_INF)
        if nt_terminal is not None:
            chart[1] = nt_terminal
        # won[w]: the block that won each cell (`_width_kernel`); its split and children are
        # found again for the nodes of the best trees.
        won = torch.zeros((N + 1, B, N, NT), dtype=torch.int8)
        if N >= 2:
            _width_kernel()(chart.numpy(), won.numpy(), *_kernel_words(right_best, left_best,
                                                                       term, NT, T),
                            _array(rules_t),
                            *_kernel_potential(span_pot, span_prob, terminal.dtype), min_w)

    # A one-word sentence has a tree only where nonterminals emit words (else chart[1] is -inf
    # throughout).
    totals = root + chart[lengths, torch.arange(B), 0]                   # (B, NT)
    scores, syms = totals.max(1)
    found: dict[int, tuple[float, int, int]] = {}   # sentence -> (score, length, top symbol)
    for b, (score, n, sym) in enumerate(zip(scores.tolist(), lengths.tolist(), syms.tolist())):
        if math.isfinite(score):
            found[b] = (score, n, sym)
    out: list[tuple[float, list[tuple[int, int, int]]] | None] = [None] * B
    trees = _backtrace(chart, won, {b: (n, sym) for b, (_, n, sym) in found.items()},
                       binary, term, right_best, left_best, min_w)
    for b, (score, _, _) in found.items():
        out[b] = (score, trees[b])
    return out


def _kernel_words(right_best: Tensor | None, left_best: Tensor | None, term: Tensor, NT: int,
                  T: int) -> tuple:
    """The word blocks' inputs of `_width_kernel` as arrays: right_best (B, N, NT, S),
    left_best (B, N, NT, NT), the word scores (B, N, T); empty arrays without preterminals."""
    if not T:
        B, N = term.shape[:2]
        empty = term.new_full((B, N, NT, NT), NEG_INF)
        return empty.numpy(), empty.numpy(), _array(term)
    return _array(right_best), _array(left_best), _array(term)


def _array(x: Tensor) -> np.ndarray:
    """A tensor's numbers as a C-ordered numpy array for the compiled loops (a view when
    they are laid out so already), whether or not it takes part in a gradient."""
    return x.detach().contiguous().numpy()


def _kernel_potential(span_pot: Tensor | None, span_prob: Tensor | None,
                      dtype: torch.dtype) -> tuple:
    """The potential as `_width_kernel` reads it: (B, N+1, N+1, C) in the chart's dtype, with
    C = 1 (one per span) or per symbol (C >= NT: the first NT columns are read), and its kind:
    0 none, 1 `span_pot` (log), 2 `span_prob` (probabilities, whose logarithms the kernel
    takes)."""
    if span_pot is not None and span_prob is not None:
        raise ValueError("viterbi takes span_pot or span_prob, not both")
    given = span_pot if span_prob is None else span_prob
    if given is None:
        return torch.zeros((1, 1, 1, 1), dtype=dtype).numpy(), 0
    pot = given if given.dim() == 4 else given[..., None]
    return _array(pot.to(dtype)), 1 if span_prob is None else 2


@functools.cache
def _width_kernel():
    """The forward of `viterbi`, every width of every sentence, in a loop compiled by numba
    (compiled on first use, per dtype). For each span (b, start p) of width w it fills
    chart[w, b, p, x], the best score of nonterminal x over the span, and won[w, b, p, x],
    the block that gave it (the first of these on ties; a span no block can build stays -inf),
    from the same float sums as a pass of torch operations would take:

    - 0, two constituents (each at least `min_w` wide): pairs[y, z] = max over splits u of
      chart[u, b, p, y] + chart[w - u, b, p + u, z], then max over (y, z) of pairs[y, z] +
      rule[x, y, z];
    - 1, a word on the right: max over y of chart[w - 1, b, p, y] + right[b, p + w - 1, x, y];
    - 2, a word on the left: max over z of chart[w - 1, b, p + 1, z] + left[b, p, x, z];
    - 3, two words: max over y of term[b, p, y] + right[b, p + 1, x, NT + y];

    then the span's potential is added (pot_kind 1; 2: its logarithm). rules_t is the pair rules
    by column, (NT * NT, NT)."""
    @jit
    def widths(chart, won, right, left, term, rules_t, pot, pot_kind, min_w):  # pragma: no cover
        N1, B, N, NT = chart.shape
        T = term.shape[2]
        K = NT * NT
        pairs = np.empty((4, K), dtype=chart.dtype)
        acc = np.empty((4, NT), dtype=chart.dtype)
        for w in range(2, N1):
            lo, hi = min_w, w - min_w
            P = N - w + 1
            for b in range(B):
                # Two constituents, four spans at a time sharing each rule column's load (the
                # four updates written out, as in `maxplus._column_kernel`).
                for p0 in range(0, P if hi >= lo else 0, 4):
                    count = min(4, P - p0)
                    pairs[:] = -np.inf
                    for j in range(count):
                        p = p0 + j
                        for y in range(NT):
                            a = chart[lo, b, p, y]
                            for z in range(NT):
                                pairs[j, y * NT + z] = a + chart[w - lo, b, p + lo, z]
                        for u in range(lo + 1, hi + 1):
                            for y in range(NT):
                                a = chart[u, b, p, y]
                                if a == -np.inf:
                                    continue
                                for z in range(NT):
                                    s = a + chart[w - u, b, p + u, z]
                                    if s > pairs[j, y * NT + z]:
                                        pairs[j, y * NT + z] = s
                    acc[:] = -np.inf
                    for k in range(K):
                        a0, a1, a2, a3 = pairs[0, k], pairs[1, k], pairs[2, k], pairs[3, k]
                        if a0 == -np.inf and a1 == -np.inf and a2 == -np.inf and \
                                a3 == -np.inf:
                            continue
                        for x in range(NT):
                            r = rules_t[k, x]
                            s = a0 + r
                            if s > acc[0, x]:
                                acc[0, x] = s
                            s = a1 + r
                            if s > acc[1, x]:
                                acc[1, x] = s
                            s = a2 + r
                            if s > acc[2, x]:
                                acc[2, x] = s
                            s = a3 + r
                            if s > acc[3, x]:
                                acc[3, x] = s
                    for j in range(count):
                        for x in range(NT):
                            chart[w, b, p0 + j, x] = acc[j, x]
                            won[w, b, p0 + j, x] = 0
                for p in range(P):
                    have = hi >= lo
                    if w - 1 >= min_w and T:
                        for side in range(2):
                            for x in range(NT):
                                v = -np.inf
                                for c in range(NT):
                                    if side == 0:
                                        s = chart[w - 1, b, p, c] + right[b, p + w - 1, x, c]
                                    else:
                                        s = chart[w - 1, b, p + 1, c] + left[b, p, x, c]
                                    if s > v:
                                        v = s
                                if not have or v > chart[w, b, p, x]:
                                    chart[w, b, p, x] = v
                                    won[w, b, p, x] = 1 + side
                            have = True
                    if w == 2 and T:
                        for x in range(NT):
                            v = -np.inf
                            for c in range(T):
                                s = term[b, p, c] + right[b, p + 1, x, NT + c]
                                if s > v:
                                    v = s
                            if not have or v > chart[w, b, p, x]:
                                chart[w, b, p, x] = v
                                won[w, b, p, x] = 3
                        have = True
                    if pot_kind == 1:
                        for x in range(NT):
                            chart[w, b, p, x] += pot[b, p, w, x if pot.shape[3] > 1 else 0]
                    elif pot_kind == 2:
                        for x in range(NT):
                            chart[w, b, p, x] += np.log(pot[b, p, w,
                                                            x if pot.shape[3] > 1 else 0])
    return widths


def _backtrace(chart: Tensor, won: Tensor, tops: dict[int, tuple[int, int]], binary: Tensor,
               terminal: Tensor, right_best: Tensor | None, left_best: Tensor | None,
               min_w: int) -> dict[int, list[tuple[int, int, int]]]:
    """The best trees of the sentences `tops` (sentence b -> (length, top symbol)): at each
    node, the block that won (`won`, numbered as `_width_kernel` numbers them), then its split
    and children found again from the same float sums the forward took the maxima of (first on
    ties, as `max` and `argmax` take them: the first split of each child pair, then the first
    pair in row-major order; the constituent's first symbol beside a word), a word child
    resolved to the first preterminal that won its max (`_tree_kernel`). terminal (B, N, T)
    the word scores. Returns each sentence's spans (start, end, symbol) in pre-order."""
    NT = binary.shape[0]
    B, N, T = terminal.shape
    if not tops:
        return {}
    roots = np.array([[b, n, sym] for b, (n, sym) in tops.items()], dtype=np.int64)
    nodes = np.zeros((int((2 * roots[:, 1] - 1).sum()), 3), dtype=np.int64)
    _tree_kernel()(chart.numpy(), won.numpy(), roots, _array(binary),
                   *_kernel_words(right_best, left_best, terminal, NT, T), min_w, nodes)
    out, at = {}, 0
    for b, n, _ in roots.tolist():
        out[b] = [(i, i + w, x) for i, w, x in nodes[at:at + 2 * n - 1].tolist()]
        at += 2 * n - 1
    return out


@functools.cache
def _tree_kernel():
    """The loop of `_backtrace`, compiled by numba: each sentence's tree depth first, the left
    child before the right, so that its nodes come out in pre-order, (start, width, symbol)
    rows of `nodes`, 2n - 1 per sentence of n words, sentence after sentence."""
    @jit
    def trees(chart, won, roots, binary, right, left, term, min_w, nodes):
        # pragma: no cover
        NT = chart.shape[3]
        T = term.shape[2]
        stack = np.empty((2 * chart.shape[0], 3), dtype=np.int64)
        at = 0
        for r in range(roots.shape[0]):
            b = roots[r, 0]
            stack[0, 0], stack[0, 1], stack[0, 2] = 0, roots[r, 1], roots[r, 2]
            depth = 1
            while depth:
                depth -= 1
                i, w, x = stack[depth, 0], stack[depth, 1], stack[depth, 2]
                nodes[at, 0], nodes[at, 1], nodes[at, 2] = i, w, x
                at += 1
                if w == 1:
                    continue
                code = won[w, b, i, x]
                if code == 0:                          # two constituents
                    best, u, y, z = -np.inf, -1, -1, -1
                    for yy in range(NT):
                        for zz in range(NT):
                            pair, split = -np.inf, -1
                            for uu in range(min_w, w - min_w + 1):
                                s = chart[uu, b, i, yy] + chart[w - uu, b, i + uu, zz]
                                if split < 0 or s > pair:
                                    pair, split = s, uu
                            s = pair + binary[x, yy, zz]
                            if u < 0 or s > best:
                                best, u, y, z = s, split, yy, zz
                elif code == 1:                        # a word on the right
                    u = w - 1
                    y, best = -1, -np.inf
                    for c in range(NT):
                        s = chart[w - 1, b, i, c] + right[b, i + w - 1, x, c]
                        if y < 0 or s > best:
                            y, best = c, s
                    z, best = -1, -np.inf
                    for t in range(T):
                        s = term[b, i + w - 1, t] + binary[x, y, NT + t]
                        if z < 0 or s > best:
                            z, best = t, s
                    z += NT
                elif code == 2:                        # a word on the left
                    u = 1
                    z, best = -1, -np.inf
                    for c in range(NT):
                        s = chart[w - 1, b, i + 1, c] + left[b, i, x, c]
                        if z < 0 or s > best:
                            z, best = c, s
                    y, best = -1, -np.inf
                    for t in range(T):
                        s = term[b, i, t] + binary[x, NT + t, z]
                        if y < 0 or s > best:
                            y, best = t, s
                    y += NT
                else:                                  # two words
                    u = 1
                    y, best = -1, -np.inf
                    for c in range(T):
                        s = term[b, i, c] + right[b, i + 1, x, NT + c]
                        if y < 0 or s > best:
                            y, best = c, s
                    y += NT
                    z, best = -1, -np.inf
                    for t in range(T):
                        s = term[b, i + 1, t] + binary[x, y, NT + t]
                        if z < 0 or s > best:
                            z, best = t, s
                    z += NT
                stack[depth, 0], stack[depth, 1], stack[depth, 2] = i + u, w - u, z
                stack[depth + 1, 0], stack[depth + 1, 1], stack[depth + 1, 2] = i, u, y
                depth += 2
    return trees
