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

from treewright.engine.maxplus import MaxPlusWeights, max_plus

NEG_INF = float("-inf")


def _best_children(scores: Tensor, rules: MaxPlusWeights) -> Tensor:
    """max over (y, z) of rules[x, y, z] + scores[..., y, z].

    scores: (B, P, Y, Z), rules: the (NT, Y * Z) rules as `max_plus` weights -> values
    (B, P, NT): a max-plus product of each span's pair scores with the rules, mostly over the
    span's best pairs (`engine.maxplus`). The maxima alone: the children that won are found
    again for the nodes of the best trees only (`_backtrace`, the same float sums).
    """
    Bt, P, X, Y = scores.shape
    return max_plus(scores.reshape(Bt * P, X * Y), rules).view(Bt, P, -1)


def _best_of_word(term: Tensor, rules: Tensor) -> Tensor:
    """For every word position, max over the word's preterminal z of rules[x, y, z] + term[z].

    term: (B, N, T) word scores, rules: (NT, Y, T) -> (B, N, NT, Y). A block with a word child
    scores the same word at every span that ends (or starts) there, so the max over its
    preterminal is taken once per position rather than once per span: the per-span work of the
    block drops from NT * Y * T to NT * Y. The max is a max-plus product of the word scores
    with the rules, mostly over each word's best preterminals (`engine.maxplus`); which
    preterminal won is found again for the few words of the best trees (`_word_preterminal`).
    """
    Bt, N, T = term.shape
    weights = MaxPlusWeights(rules.reshape(-1, T))                      # (NT * Y, T)
    return max_plus(term.reshape(Bt * N, T), weights).view(Bt, N, *rules.shape[:2])


def _word_preterminal(word: Tensor, rules: Tensor) -> int:
    """The first preterminal z maximizing rules[z] + word[z] (the sum `_best_of_word` takes
    the max of), both (T,)."""
    return int((word + rules).argmax())


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
                pairs = torch.stack([cells[u][:, 0:P, :, None] + cells[w - u][:, u:u + P, None, :]
                                     for u in range(lo, hi + 1)], 2)   # (B, P, K, NT, NT)
                options.append(_best_children(pairs.amax(2), r_nn))
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
        out.append((float(score), _backtrace(back, cells, b, n, int(sym), binary, terminal[b],
                                             right_best if T else None,
                                             left_best if T else None, min_w)))
    return out


_PAIR, _WORD_RIGHT, _WORD_LEFT, _TWO_WORDS, _NONE = \
    "two constituents", "a word on the right", "a word on the left", "two words", "none"


def _backtrace(back, cells, b: int, n: int, top: int, binary: Tensor, term: Tensor,
               right_best: Tensor | None, left_best: Tensor | None, min_w: int
               ) -> list[tuple[int, int, int]]:
    """Sentence b's best tree: at each node, the block that won (`back`), then its split and
    children found again from the same float sums the pass took the maxima of (first on ties,
    as `max` and `argmax` take them: the first split of each child pair, then the first pair in
    row-major order; the constituent's first symbol beside a word), a word child resolved to the
    preterminal that won its max (`_word_preterminal`); term (N, T) its word scores."""
    NT = binary.shape[0]
    spans = []
    stack = [(0, n, top)]
    while stack:
        i, j, sym = stack.pop()
        spans.append((i, j, sym))
        w = j - i
        if w == 1:
            continue
        which, kinds = back[w]
        kind = kinds[int(which[b, i, sym])]
        if kind == _PAIR:
            pairs = torch.stack([cells[u][b, i, :, None] + cells[w - u][b, i + u, None, :]
                                 for u in range(min_w, w - min_w + 1)])   # (K, NT, NT)
            pair_best, pair_split = pairs.max(0)
            flat = int((pair_best.reshape(-1) + binary[sym, :NT, :NT].reshape(-1)).argmax())
            y, z = flat // NT, flat % NT
            u = int(pair_split.reshape(-1)[flat]) + min_w
        elif kind == _WORD_RIGHT:
            u = w - 1
            y = int((cells[w - 1][b, i] + right_best[b, j - 1, sym, :NT]).argmax())
            z = NT + _word_preterminal(term[j - 1], binary[sym, y, NT:])
        elif kind == _WORD_LEFT:
            u = 1
            z = int((cells[w - 1][b, i + 1] + left_best[b, i, sym]).argmax())
            y = NT + _word_preterminal(term[i], binary[sym, NT:, z])
        else:                               # two words (a span with no block has no tree)
            u = 1
            y = NT + int((term[i] + right_best[b, i + 1, sym, NT:]).argmax())
            z = NT + _word_preterminal(term[j - 1], binary[sym, y, NT:])
        stack.append((i + u, j, z))
        stack.append((i, i + u, y))
    return spans
