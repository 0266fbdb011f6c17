"""The inside pass of a bilexicalized PCFG, with the latent-variable decomposition of
Yang, Zhao & Tu 2021, "Neural Bi-Lexicalized PCFG Induction" (NAACL).

The grammar. Every constituent A[h] carries a head word, the word at position h of the
sentence. Nonterminals (NT of them) cover two or more words and rewrite to two children;
preterminals (T of them) cover one word, whose position is their head. A binary rule keeps the
parent's head in one child, the head child, and the other child, the dependent, brings a new
head word h' (the word h' depends on h):

    head on the left:   A[h] -> B[h] C[h']   (h < h')
    head on the right:  A[h] -> B[h'] C[h]   (h' < h)

The factorisation (our wording of the paper's decomposition of the binary rules; the names
are ours, and which factor carries the side is written from memory of the paper: what this
module computes is exactly the formula below). A latent class H in {1..R} mediates everything
the rule says about the pair of words: given the parent A and its head word x_h, draw H; then,
given H alone, draw the head child's symbol together with the side it stands on, the
dependent child's symbol, and the dependent's head word:

    p(A[h] -> B[h] C[h'])  = sum_H p(H | A, x_h) p(B, left | H)  p(C | H) p(x_h' | H)
    p(A[h] -> B[h'] C[h])  = sum_H p(H | A, x_h) p(C, right | H) p(B | H) p(x_h' | H)

p(. , side | H) is one distribution over the 2S (symbol, side) pairs, p(. | H) one over the S
symbols, p(. | H) over words one over the vocabulary, so each parent's rules sum to one over
side, both symbols and the dependent word. The head word x_h and the dependent word x_h'
meet only through H: neither the symbols B, C nor the other word are needed to score one
against the other, which is what takes the inside pass from O(n^5) to O(n^4).

The root rule S -> A[h] has its own score per (position, symbol), and a preterminal's word
needs no further score in the paper's model (its word was drawn as a head or a dependent);
`terminal` lets a caller add one.

The dynamic program. beta(i, j, h, A) is the inside score of A[h] over span [i, j). Summing
the head-left rule over the split k, the dependent word h' in [k, j) and B, C:

    beta(i, j, h, A) = sum_H p(H | A, x_h) z(i, j, h, H),
    z(i, j, h, H)    = sum_k  L(i, k, h, H) D(k, j, H)          (h in [i, k), head left)
                     + sum_k  Rt(k, j, h, H) D(i, k, H)         (h in [k, j), head right)
    L(i, k, h, H)    = sum_B p(B, left | H) beta(i, k, h, B)            (head-child roles)
    Rt(k, j, h, H)   = sum_C p(C, right | H) beta(k, j, h, C)
    D(k, j, H)       = sum_h' p(x_h' | H) sum_C p(C | H) beta(k, j, h', C)   (dependent role)

The dependent role D has its head summed out, so z costs O(n^4 R) (spans, heads, splits) and
every projection O(n^3 S R): O(n^4 R + n^3 S R) per sentence, against O(n^5 S^3) for the
lexicalized rules written out. The vocabulary never appears: callers gather the word factors
at the sentence's own positions (`dep_word`, `head`, `root`), so no V x V table exists.

Everything is in log space and differentiable by autograd: the gradient of log Z with respect
to a factor's log-weights is its expected count (Eisner 2016, "Inside-Outside and
Forward-Backward Algorithms Are Just Backprop"). The same code runs in the max semiring
(Goodman 1999, "Semiring Parsing"), where the gradient with respect to a zero potential on
every chart cell marks the cells of the best derivation. A derivation here includes the latent
class H at each binary node, so the Viterbi result is the best (tree, classes) pair, the
standard Viterbi of a latent-variable grammar; the best tree with H summed out would need the
O(n^5) program.

Shapes: B sentences, N longest length, NT nonterminals, T preterminals, S = NT + T symbols
(nonterminals first), R latent classes, P = N - w + 1 spans of width w.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import torch
from torch import Tensor


class LexicalizedFactors(NamedTuple):
    """Log-weights of one batch (the model's factors gathered at each sentence's words)."""
    root: Tensor        # (B, N, S)   log p(S -> A[h]); preterminal entries used by 1-word sentences
    head: Tensor        # (B, N, NT, R)  log p(H | A, x_h) at every position h
    head_child: Tensor  # (R, 2, S)   log p(head child symbol, side | H); side 0 left, 1 right
    dep_child: Tensor   # (R, S)      log p(dependent child symbol | H)
    dep_word: Tensor    # (B, N, R)   log p(x_h' | H) at every position h'
    terminal: Tensor | None = None  # (B, N, T) log p(T[x_i] -> x_i); None: zero (the paper)

    def tempered(self, beta: float) -> "LexicalizedFactors":
        """Every log-weight times beta: a derivation (its tree, heads and latent classes)
        then scores p(d)^beta, so log Z of the result is log sum_d p(d)^beta and its gradient
        is beta times the expected gradient of log p(d) under the posterior proportional to
        p(d)^beta, flatter than the model's for beta < 1: the E-step of deterministic
        annealing (Smith & Eisner 2004, "Annealing Techniques for Unsupervised Statistical
        Language Learning"). beta = 1 returns the factors themselves."""
        if beta == 1.0:
            return self
        if not beta > 0.0:
            raise ValueError(f"the annealing exponent must be positive, got {beta}")
        return LexicalizedFactors(*(None if x is None else x * beta for x in self))


class _SafeLog(torch.autograd.Function):
    """log x whose gradient is 0 where x = 0: a dead cell (-inf) passes no NaN backwards."""

    @staticmethod
    def forward(ctx, x):
        ctx.save_for_backward(x)
        return x.log()

    @staticmethod
    def backward(ctx, grad):
        (x,) = ctx.saved_tensors
        return torch.where(x > 0, grad / torch.where(x > 0, x, torch.ones_like(x)),
                           torch.zeros_like(x))


def _shift(x: Tensor, dim: int) -> Tensor:
    """Detached maximum along `dim` (kept), 0 where the whole slice is -inf. The shift cancels
    out of the value, so it carries no gradient."""
    m = x.detach().amax(dim, keepdim=True)
    return torch.where(torch.isfinite(m), m, torch.zeros_like(m))


def _reduce(x: Tensor, dim: int, semiring: str) -> Tensor:
    """log-sum-exp ("log") or max ("max") over `dim`. The max routes its gradient to a single
    argument (ties go to one), so a max-semiring gradient marks one derivation."""
    if semiring == "max":
        return x.max(dim).values
    m = _shift(x, dim)
    return _SafeLog.apply((x - m).exp().sum(dim)) + m.squeeze(dim)


def _contract(x: Tensor, y: Tensor, semiring: str) -> Tensor:
    """out[..., m] = reduce_k x[..., k] + y[..., m, k]: a log-space (or max-plus) product of
    x (..., K) with y (..., M, K), y broadcast over x's leading axes. In the sum semiring it is
    one matrix product of shifted exponentials."""
    if semiring == "max":
        return (x.unsqueeze(-2) + y).max(-1).values
    mx, my = _shift(x, -1), _shift(y, -1)                          # (..., 1), (..., M, 1)
    prod = torch.matmul((y - my).exp(), (x - mx).exp().unsqueeze(-1)).squeeze(-1)   # (..., M)
    return _SafeLog.apply(prod) + mx + my.squeeze(-1)


def _windows(x: Tensor, width: int) -> Tensor:
    """(B, N, *rest) -> (B, P, width, *rest): x at positions i + h for span start i, offset h
    (a view)."""
    rest = x.dim() - 2
    return x.unfold(1, width, 1).permute(0, 1, x.dim(), *range(2, 2 + rest))


def _offsets(width: int, weight: float, like: Tensor, from_right: bool) -> Tensor:
    """(1, 1, width, 1): `weight` times the number of words between each position of a span
    of `width` and the span's right edge (`from_right`) or left edge, the position excluded."""
    count = torch.arange(width, dtype=like.dtype, device=like.device)
    if from_right:
        count = width - 1 - count
    return (weight * count)[None, None, :, None]


def _inside(f: LexicalizedFactors, lengths: Tensor, span_pot: Tensor | None, semiring: str,
            pots: dict[int, Tensor] | None = None, head_pot: Tensor | None = None,
            arc_length: float = 0.0) -> Tensor:
    """(B,) log Z (or the best derivation's log score) of the batch; `pots[w]`, shaped like the
    width-w chart (B, P, w, K), is added to its cells (for marginals and Viterbi by gradient);
    `head_pot` and `arc_length` as `lexicalized_log_partition` takes them."""
    B, N, NT, R = f.head.shape
    S = f.root.shape[-1]
    T = S - NT
    terminal = f.terminal if f.terminal is not None else f.root.new_zeros(B, N, T)
    beta: dict[int, Tensor] = {}        # w -> (B, P, w, K): K = T at width 1, NT above
    left_role: dict[int, Tensor] = {}   # w -> (B, P, w, R)  L: the span as a left head child
    right_role: dict[int, Tensor] = {}  # w -> (B, P, w, R)  Rt: as a right head child
    dependent: dict[int, Tensor] = {}   # w -> (B, P, R)     D: as a dependent, head summed out
    # With an arc-length weight the dependent role differs by side: the words between a
    # dependent and its head split at the boundary of the two children, (words from the
    # dependent to its own span's edge) + (words from the head to the head child's edge), so
    # each child carries its own part and the pass stays O(n^4 R).
    dependent_left: dict[int, Tensor] = dependent   # as the left child of a head-right rule
    if arc_length != 0.0:
        dependent_left = {}
    for w in range(1, N + 1):
        P = N - w + 1
        if w == 1:
            cells = terminal.unsqueeze(2)                                  # (B, N, 1, T)
            symbols = slice(NT, S)
        else:
            candidates = []
            for u in range(1, w):   # left child [i, i+u), right child [i+u, i+w)
                head_left = left_role[u][:, 0:P] + dependent[w - u][:, u:u + P, None, :]
                head_right = right_role[w - u][:, u:u + P] + dependent_left[u][:, 0:P, None, :]
                if arc_length != 0.0:   # words from the head to its child's inner edge
                    head_left = head_left + _offsets(u, arc_length, head_left, True)
                    head_right = head_right + _offsets(w - u, arc_length, head_right, False)
                candidates.append(torch.cat([head_left, head_right], 2))  # (B, P, w, R)
            z = _reduce(torch.stack(candidates, 2), 2, semiring)          # (B, P, w, R)
            cells = _contract(z, _windows(f.head, w), semiring)           # (B, P, w, NT)
            if span_pot is not None:
                cells = cells + span_pot[:, 0:P, w, None, None]
            if head_pot is not None:
                cells = cells + head_pot[:, 0:P, w, :w, None]
            symbols = slice(0, NT)
        if pots is not None:
            cells = cells + pots[w]
        beta[w] = cells
        if w < N:  # only spans narrower than the sentence are ever children
            left_role[w] = _contract(cells, f.head_child[:, 0, symbols], semiring)
            right_role[w] = _contract(cells, f.head_child[:, 1, symbols], semiring)
            as_dependent = _contract(cells, f.dep_child[:, symbols], semiring)   # (B, P, w, R)
            as_dependent = as_dependent + _windows(f.dep_word, w)
            if arc_length == 0.0:
                dependent[w] = _reduce(as_dependent, 2, semiring)
            else:   # words from the dependent to its span's inner edge, on either side
                dependent[w] = _reduce(as_dependent + _offsets(w, arc_length, cells, False),
                                       2, semiring)
                dependent_left[w] = _reduce(as_dependent + _offsets(w, arc_length, cells, True),
                                            2, semiring)
    scores = []
    for b, n in enumerate(lengths.tolist()):
        if n == 1:
            top = beta[1][b, 0, 0] + f.root[b, 0, NT:]                     # (T,)
        else:
            top = (beta[n][b, 0] + f.root[b, :n, :NT]).flatten()           # (n * NT,)
        scores.append(_reduce(top, 0, semiring))
    return torch.stack(scores)


def lexicalized_log_partition(factors: LexicalizedFactors, lengths: Tensor,
                              span_pot: Tensor | None = None,
                              head_pot: Tensor | None = None,
                              arc_length: float = 0.0) -> Tensor:
    """(B,) log Z of each sentence, differentiable with respect to every factor.

    lengths (B,) sentence lengths (<= N); span_pot (B, N+1, N+1) [b, start, width], optional
    log-potentials added to every constituent of width >= 2 (as in `engine.inside`); head_pot
    (B, N+1, N+1, N) [b, start, width, head - start], optional log-potentials added to every
    constituent of width >= 2 headed by that word (-inf forbids the pair: a sum over the
    derivations whose constituents and heads are allowed, e.g. only those of known heads).
    arc_length, a log-weight added for every word that lies between a dependent and its head,
    summed over the derivation's arcs (negative: short dependencies weigh more, the locality
    bias of Smith & Eisner 2006, "Annealing Structural Bias in Multilingual Weighted Grammar
    Induction"); adjacent words cost nothing. A sentence with no parse gets -inf and zero
    gradients.
    """
    return _inside(factors, torch.as_tensor(lengths), span_pot, "log", head_pot=head_pot,
                   arc_length=arc_length)


def _cell_potentials(factors: LexicalizedFactors) -> dict[int, Tensor]:
    B, N, NT, _ = factors.head.shape
    T = factors.root.shape[-1] - NT
    return {w: factors.root.new_zeros(B, N - w + 1, w, T if w == 1 else NT, requires_grad=True)
            for w in range(1, N + 1)}


def _marked_cells(factors: LexicalizedFactors, lengths: Tensor, semiring: str,
                  span_pot: Tensor | None = None) -> tuple[Tensor, dict[int, Tensor]]:
    """Scores (B,) and, per width, the gradient of the scores with respect to a zero potential
    on every cell (B, P, w, K): posterior marginals in the log semiring, the best derivation's
    cells (1) in the max semiring; `span_pot` as in `lexicalized_log_partition`."""
    detached = LexicalizedFactors(*(None if x is None else x.detach() for x in factors))
    pots = _cell_potentials(factors)
    with torch.enable_grad():
        scores = _inside(detached, lengths, span_pot, semiring, pots)
        ok = torch.isfinite(scores)
        widths = sorted(pots)
        grads = torch.autograd.grad(torch.where(ok, scores, torch.zeros_like(scores)).sum(),
                                    [pots[w] for w in widths])
    return scores.detach(), dict(zip(widths, grads))


@dataclass
class LexicalizedParse:
    """The best derivation of one sentence.

    score: its log-probability (tree and latent classes); -inf when there is no parse.
    spans: (start, end, symbol, head) for every constituent, preterminals included; symbol
        indexes the joint list (nonterminals first), head is a 0-based word position.
    heads: for each word, the 1-based position of its head word, 0 for the root's head word
        (the CoNLL-U HEAD convention).
    """
    score: float
    spans: list[tuple[int, int, int, int]]
    heads: list[int]


def heads_from_spans(spans: list[tuple[int, int, int, int]], n: int) -> list[int]:
    """Dependency heads (1-based, 0 for the root) read off a lexicalized binary tree: a word
    depends on the head of the smallest constituent above the largest one it heads."""
    heads = [0] * n
    ordered = sorted(spans, key=lambda s: s[1] - s[0])     # narrowest first
    for k, (i, j, _, h) in enumerate(ordered):
        parent = next((p for p in ordered[k + 1:] if p[0] <= i and j <= p[1]
                       and (p[0], p[1]) != (i, j)), None)
        if parent is not None and parent[3] != h:
            heads[h] = parent[3] + 1
    return heads


def lexicalized_viterbi(factors: LexicalizedFactors, lengths: Tensor,
                        span_pot: Tensor | None = None) -> list[LexicalizedParse]:
    """The best derivation of each sentence (max semiring, read off by gradient: Eisner 2016),
    among the trees `span_pot` allows (as in `lexicalized_log_partition`; its score is the
    derivation's log-probability plus the potentials of its spans)."""
    lengths = torch.as_tensor(lengths)
    NT = factors.head.shape[2]
    if span_pot is not None:
        span_pot = span_pot.to(factors.root.dtype)
    scores, marks = _marked_cells(factors, lengths, "max", span_pot)
    parses = []
    for b, n in enumerate(lengths.tolist()):
        spans = []
        if torch.isfinite(scores[b]):
            for w, mark in marks.items():
                if w > n:
                    continue
                for i, h, k in (mark[b, :n - w + 1] > 0.5).nonzero().tolist():
                    spans.append((i, i + w, k + NT if w == 1 else k, i + h))
        spans.sort(key=lambda s: (s[0], -s[1]))
        parses.append(LexicalizedParse(float(scores[b]), spans,
                                       heads_from_spans(spans, n) if spans else [0] * n))
    return parses


def lexicalized_marginals(factors: LexicalizedFactors, lengths: Tensor
                          ) -> tuple[Tensor, dict[int, Tensor]]:
    """log Z (B,) and, per width w, the posterior probability (B, P, w, K) that span
    [i, i+w) is a constituent of symbol k headed by word i + h (K = T at width 1, NT above)."""
    return _marked_cells(factors, torch.as_tensor(lengths), "log")
