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

from treewright.engine.maxplus import MaxPlusWeights, max_plus_dense

NEG_INF = float("-inf")


def _best_children(scores: Tensor, rules: MaxPlusWeights) -> Tensor:
    """max over (y, z) of rules[x, y, z] + scores[..., y, z].

    scores: (B, P, Y, Z), rules: the (NT, Y * Z) rules as `max_plus` weights -> values
    (B, P, NT): a max-plus product of each span's pair scores with the rules, over every pair
    (`engine.maxplus.max_plus_dense`). The maxima alone: the children that won are found
    again for the nodes of the best trees only (`_backtrace`, the same float sums).
    """
    Bt, P, X, Y = scores.shape
    return max_plus_dense(scores.reshape(Bt * P, X * Y), rules).view(Bt, P, -1)


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


def _best_beside_word(cell: Tensor, word_best: Tensor) -> Tensor:
    """max over the constituent's symbol c of cell[..., c] + word_best[..., x, c].

    cell (B, P, C), word_best (B, P, NT, C) -> values (B, P, NT) (the best c is found again
    for the nodes of the best trees: `_backtrace`).
    """
    return (cell[:, :, None, :] + word_best).amax(-1)


def viterbi(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
            nt_terminal: Tensor | None = None, span_pot: Tensor | None = None
            ) -> list[tuple[float, list[tuple[int, int, int]]] | None]:
    """The most probable tree of each sentence (arguments as in `engine.inside.log_partition`;
    here `span_pot` may also be given per nonterminal, (B, N+1, N+1, NT), a log potential added
    to each nonterminal's score over each span of width >= 2).

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
        r_nn = MaxPlusWeights(binary[:, :NT, :NT].reshape(NT, NT * NT))
        min_w = 1 if nt_terminal is not None else 2
        term = terminal                                            # (B, N, T)
        if T:
            # right_best[b, p, x, y]: the best of x -> y z over the preterminal z of word p
            # (y any symbol: a nonterminal, or a preterminal for the two-word block);
            # left_best[b, p, x, z]: the best of x -> y z over the preterminal y of word p.
            right_best = _best_of_word(term, binary[:, :, NT:])
            left_best = _best_of_word(term, binary[:, NT:, :NT].transpose(1, 2))
        # cells[w]: (B, N - w + 1, NT) best log score of each nonterminal over each span.
        cells = {1: nt_terminal if nt_terminal is not None
                 else terminal.new_full((B, N, NT), NEG_INF)}
        # back[w]: (the block that won, (B, P, NT) int64, and the blocks' names in order); the
        # split and children within it are found again for the nodes of the best trees.
        back: dict[int, tuple[Tensor, list[str]]] = {}
        for w in range(2, N + 1):
            P = N - w + 1
            options, kinds = [], []   # each (B, P, NT)
            lo, hi = min_w, w - min_w
            if hi >= lo:
                # The best split of each child pair, kept as a running maximum (B, P, NT, NT)
                # rather than every split's sums at once.
                pairs = cells[lo][:, 0:P, :, None] + cells[w - lo][:, lo:lo + P, None, :]
                for u in range(lo + 1, hi + 1):
                    torch.maximum(pairs, cells[u][:, 0:P, :, None] +
                                  cells[w - u][:, u:u + P, None, :], out=pairs)
                options.append(_best_children(pairs, r_nn))
                kinds.append(_PAIR)
            # Blocks with a preterminal child exist only when there are preterminals: a general
            # CNF grammar may have none (T = 0), and a max over an empty block is an error.
            if w - 1 >= min_w and T:
                options.append(_best_beside_word(cells[w - 1][:, 0:P],
                                                 right_best[:, w - 1:N, :, :NT]))
                kinds.append(_WORD_RIGHT)
                options.append(_best_beside_word(cells[w - 1][:, 1:1 + P], left_best[:, 0:P]))
                kinds.append(_WORD_LEFT)
            if w == 2 and T:
                options.append(_best_beside_word(term[:, 0:P], right_best[:, 1:1 + P, :, NT:]))
                kinds.append(_TWO_WORDS)
            if not options:  # no block fits this width (no rules can build such a span)
                options.append(terminal.new_full((B, P, NT), NEG_INF))
                kinds.append(_NONE)
            best, which = torch.stack(options).max(0)                   # first block on ties
            if span_pot is not None:
                best = best + (span_pot[:, 0:P, w] if span_pot.dim() == 4
                               else span_pot[:, 0:P, w, None])
            cells[w] = best
            back[w] = (which, kinds)

    out: list[tuple[float, list[tuple[int, int, int]]] | None] = []
    found: dict[int, tuple[float, int, int]] = {}   # sentence -> (score, length, top symbol)
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
        found[b] = (float(score), n, int(sym))
        out.append(None)
    trees = _backtrace(back, cells, {b: (n, sym) for b, (_, n, sym) in found.items()},
                       binary, terminal, right_best if T else None, left_best if T else None,
                       min_w)
    for b, (score, _, _) in found.items():
        out[b] = (score, trees[b])
    return out


_PAIR, _WORD_RIGHT, _WORD_LEFT, _TWO_WORDS, _NONE = \
    "two constituents", "a word on the right", "a word on the left", "two words", "none"


def _backtrace(back, cells, tops: dict[int, tuple[int, int]], binary: Tensor,
               terminal: Tensor, right_best: Tensor | None, left_best: Tensor | None,
               min_w: int) -> dict[int, list[tuple[int, int, int]]]:
    """The best trees of the sentences `tops` (sentence b -> (length, top symbol)): at each
    node, the block that won (`back`), then its split and children found again from the same
    float sums the pass took the maxima of (first on ties, as `max` and `argmax` take them:
    the first split of each child pair, then the first pair in row-major order; the
    constituent's first symbol beside a word), a word child resolved to the first preterminal
    that won its max. A node's children are narrower than it, so the nodes of one width, of
    every tree, are resolved at once, from the widest down, each block kind in one step.
    terminal (B, N, T) the word scores. Returns each sentence's spans (start, end, symbol) in
    pre-order."""
    NT = binary.shape[0]
    # Every node found and not yet resolved, (sentence, start, width, symbol) rows.
    pool = [torch.tensor([[b, 0, n, sym] for b, (n, sym) in tops.items()],
                         dtype=torch.long).view(-1, 4)]
    nodes = []
    for w in range(max((n for n, _ in tops.values()), default=0), 1, -1):
        every = torch.cat(pool)
        here = every[:, 2] == w
        pool = [every[~here]]
        b, i, _, sym = every[here].unbind(1)
        if not len(b):
            continue
        nodes.append(every[here])
        which, kinds = back[w]
        kind = which[b, i, sym]
        for k, name in enumerate(kinds):
            at = (kind == k).nonzero().flatten()
            if not len(at):
                continue
            kb, ki, ks = b[at], i[at], sym[at]
            if name == _PAIR:
                us = torch.arange(min_w, w - min_w + 1)
                left = torch.stack([cells[u][kb, ki] for u in us.tolist()], 1)   # (m, K, NT)
                right = torch.stack([cells[w - u][kb, ki + u] for u in us.tolist()], 1)
                pair_best, pair_split = (left[..., :, None] + right[..., None, :]).max(1)
                flat = (pair_best.flatten(1) + binary[ks, :NT, :NT].flatten(1)).argmax(1)
                y, z = flat // NT, flat % NT
                u = us[pair_split.flatten(1).gather(1, flat[:, None]).squeeze(1)]
            elif name == _WORD_RIGHT:
                u = torch.full_like(kb, w - 1)
                y = (cells[w - 1][kb, ki] + right_best[kb, ki + w - 1, ks, :NT]).argmax(1)
                z = NT + (terminal[kb, ki + w - 1] + binary[ks, y, NT:]).argmax(1)
            elif name == _WORD_LEFT:
                u = torch.ones_like(kb)
                z = (cells[w - 1][kb, ki + 1] + left_best[kb, ki, ks]).argmax(1)
                y = NT + (terminal[kb, ki] + binary[ks, NT:, z]).argmax(1)
            else:                           # two words (a span with no block has no tree)
                u = torch.ones_like(kb)
                y = NT + (terminal[kb, ki] + right_best[kb, ki + 1, ks, NT:]).argmax(1)
                z = NT + (terminal[kb, ki + 1] + binary[ks, y, NT:]).argmax(1)
            pool.append(torch.stack([kb, ki, u, y], 1))
            pool.append(torch.stack([kb, ki + u, w - u, z], 1))
    nodes.extend(pool)                      # what is left spans one word each
    out: dict[int, list[tuple[int, int, int]]] = {b: [] for b in tops}
    every = torch.cat(nodes)
    if len(every):
        # Pre-order: by sentence, then start, then the wider span first.
        sb, si, sw = every[:, 0], every[:, 1], every[:, 2]
        m = int(sw.max()) + 1
        for b, i, w, x in every[torch.argsort((sb * m + si) * m + (m - 1 - sw))].tolist():
            out[b].append((i, i + w, x))
    return out
