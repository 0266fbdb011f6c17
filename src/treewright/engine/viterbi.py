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

NEG_INF = float("-inf")
WORD = -1  # a back pointer's child that is a word, its preterminal not yet chosen


CHUNK = 2 ** 21  # elements of the largest temporary of a max over children


def _best_children(scores: Tensor, rules: Tensor) -> tuple[Tensor, Tensor]:
    """max over (y, z) of rules[x, y, z] + scores[..., y, z], first (y, z) in row-major order
    on ties.

    scores: (B, P, Y, Z), rules: (NT, Y, Z) -> values (B, P, NT), flat argmax (B, P, NT).
    Rows (B * P) are taken in chunks so that the sum (rows, NT, Y * Z) stays small.
    """
    Bt, P, X, Y = scores.shape
    rows = scores.reshape(Bt * P, 1, X * Y)
    flat_rules = rules.reshape(1, -1, X * Y)
    values = scores.new_empty(Bt * P, rules.shape[0])
    where = torch.empty(Bt * P, rules.shape[0], dtype=torch.long)
    step = max(1, CHUNK // max(1, rules.numel()))
    for r0 in range(0, Bt * P, step):
        torch.max(rows[r0:r0 + step] + flat_rules, -1, out=(values[r0:r0 + step],
                                                           where[r0:r0 + step]))
    return values.view(Bt, P, -1), where.view(Bt, P, -1)


def _best_of_word(term: Tensor, rules: Tensor) -> Tensor:
    """For every word position, max over the word's preterminal z of rules[x, y, z] + term[z].

    term: (B, N, T) word scores, rules: (NT, Y, T) -> (B, N, NT, Y). A block with a word child
    scores the same word at every span that ends (or starts) there, so the max over its
    preterminal is taken once per position rather than once per span: the per-span work of the
    block drops from NT * Y * T to NT * Y. The max runs as T elementwise maxima over (rows,
    NT * Y), several times faster than a reduction over a short last axis; which preterminal
    won is found again for the few words of the best trees (`_word_preterminal`).
    """
    Bt, N, T = term.shape
    flat = rules.permute(2, 0, 1).reshape(T, -1)                        # (T, NT * Y)
    rows = term.reshape(Bt * N, T)
    out = term.new_empty(Bt * N, flat.shape[1])
    step = max(1, CHUNK // 16 // max(1, flat.shape[1]))   # rows whose maxima stay in cache
    for r0 in range(0, Bt * N, step):
        part, word = out[r0:r0 + step], rows[r0:r0 + step]
        torch.add(word[:, 0, None], flat[0], out=part)
        for z in range(1, T):
            torch.maximum(part, word[:, z, None] + flat[z], out=part)
    return out.view(Bt, N, *rules.shape[:2])


def _word_preterminal(word: Tensor, rules: Tensor) -> int:
    """The first preterminal z maximizing rules[z] + word[z] (the sum `_best_of_word` takes
    the max of), both (T,)."""
    return int((word + rules).argmax())


def _best_beside_word(cell: Tensor, word_best: Tensor) -> tuple[Tensor, Tensor]:
    """max over the constituent's symbol c of cell[..., c] + word_best[..., x, c].

    cell (B, P, C), word_best (B, P, NT, C) -> values (B, P, NT) and the best c, the first on
    ties.
    """
    return (cell[:, :, None, :] + word_best).max(-1)


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
        r_nn = binary[:, :NT, :NT]
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
        # back[w]: (split u, left child, right child), each (B, P, NT) int64; WORD for a word
        # child, whose preterminal `_backtrace` finds
        back: dict[int, tuple[Tensor, Tensor, Tensor]] = {}
        for w in range(2, N + 1):
            P = N - w + 1
            options = []   # (values, split, left child, right child), each (B, P, NT)
            lo, hi = min_w, w - min_w
            if hi >= lo:
                pairs = torch.stack([cells[u][:, 0:P, :, None] + cells[w - u][:, u:u + P, None, :]
                                     for u in range(lo, hi + 1)], 2)   # (B, P, K, NT, NT)
                pair_best, pair_split = pairs.max(2)                    # (B, P, NT, NT)
                values, flat = _best_children(pair_best, r_nn)
                left, right = flat // NT, flat % NT
                split = torch.gather(pair_split.reshape(B, P, NT * NT), 2, flat) + lo
                options.append((values, split, left, right))
            # Blocks with a preterminal child exist only when there are preterminals: a general
            # CNF grammar may have none (T = 0), and a max over an empty block is an error.
            if w - 1 >= min_w and T:
                values, left = _best_beside_word(cells[w - 1][:, 0:P],
                                                 right_best[:, w - 1:N, :, :NT])
                word = torch.full_like(left, WORD)
                options.append((values, torch.full_like(left, w - 1), left, word))
                values, right = _best_beside_word(cells[w - 1][:, 1:1 + P], left_best[:, 0:P])
                options.append((values, torch.ones_like(right), word, right))
            if w == 2 and T:
                values, y = _best_beside_word(term[:, 0:P], right_best[:, 1:1 + P, :, NT:])
                options.append((values, torch.ones_like(y), y + NT, torch.full_like(y, WORD)))
            if not options:  # no block fits this width (no rules can build such a span)
                none = terminal.new_full((B, P, NT), NEG_INF)
                zero = torch.zeros(B, P, NT, dtype=torch.long)
                options.append((none, zero, zero, zero))
            values = torch.stack([o[0] for o in options])               # (K, B, P, NT)
            best, which = values.max(0)
            pick = which.unsqueeze(0)
            split, left, right = (torch.stack([o[k] for o in options]).gather(0, pick)[0]
                                  for k in (1, 2, 3))
            if span_pot is not None:
                best = best + (span_pot[:, 0:P, w] if span_pot.dim() == 4
                               else span_pot[:, 0:P, w, None])
            cells[w] = best
            back[w] = (split, left, right)

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
        out.append((float(score), _backtrace(back, b, n, int(sym), binary, terminal[b])))
    return out


def _backtrace(back, b: int, n: int, top: int, binary: Tensor, term: Tensor
               ) -> list[tuple[int, int, int]]:
    """Sentence b's best tree from the back pointers, a WORD child resolved to the preterminal
    that won its max (`_word_preterminal`); term (N, T) its word scores."""
    NT = binary.shape[0]
    spans = []
    stack = [(0, n, top)]
    while stack:
        i, j, sym = stack.pop()
        spans.append((i, j, sym))
        if j - i == 1:
            continue
        split, left, right = back[j - i]
        u = int(split[b, i, sym])
        y, z = int(left[b, i, sym]), int(right[b, i, sym])
        if z == WORD:
            z = NT + _word_preterminal(term[j - 1], binary[sym, y, NT:])
        if y == WORD:
            y = NT + _word_preterminal(term[i], binary[sym, NT:, z])
        stack.append((i + u, j, z))
        stack.append((i, i + u, y))
    return spans
