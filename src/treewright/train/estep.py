"""The E-step: expected rule counts of a batch of sentences, from the engine's posteriors.

Sentences are held as word-id tensors; the terminal scores the engine needs are gathered from the
lexical rules, and lexical expected counts are the terminal marginals scattered back to word ids.
"""

from __future__ import annotations

import contextlib
import dataclasses
from dataclasses import dataclass
from typing import Iterator, Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.inference import encode_ids, pad_ids
from treewright.params.base import RulesScorer, span_posteriors
from treewright.params.compound import (compound_log_partition, compound_span_posteriors,
                                        sentence_terminal_scores)
from treewright.params.independent import IndependentRules
from treewright.params.lowrank import LowRankRules
from treewright.params.tabular import RuleTensors
from treewright.word_pieces import cuts_piece, piece_mask

# Re-exported: the engine-facing helpers moved to the parameterizations (params.base,
# params.compound); tests and benchmarks import them from here.
__all__ = ["Batch", "DivergedError", "ExpectedCounts", "add_counts", "batch_counts",
           "expected_counts", "independent_counts",
           "compound_log_partition", "compound_span_posteriors", "crossing_mask", "edge_bias",
           "log_partition_of", "make_batch", "piece_mask", "sentence_logliks",
           "sentence_terminal_scores", "span_posteriors", "zero_counts"]

NEG_INF = float("-inf")


@dataclass
class Batch:
    """Sentences of one engine call."""
    indices: list[int]          # positions in the training (or dev) sentence list
    ids: Tensor                 # (B, N) word ids; padding is id 0
    lengths: Tensor             # (B,)
    span_pot: Tensor | None     # (B, N+1, N+1) 0 or -inf per span [start, width]; None: free
    head_bias: Tensor | None = None   # (B, N) lexicalized: log-weight of each dependent the
                                      # word at each position takes (bias.head_list)
    arc_length: float = 0.0           # lexicalized: log-weight of each word between a
                                      # dependent and its head (bias.arc_length)

    @property
    def words(self) -> int:
        return int(self.lengths.sum())

    def subset(self, keep: Tensor) -> "Batch":
        """The sentences of this batch where `keep` (B,) is True, in order."""
        rows = keep.nonzero().flatten()
        pick = (lambda t: None if t is None else t[rows])
        return Batch([self.indices[i] for i in rows.tolist()], self.ids[rows],
                     self.lengths[rows], pick(self.span_pot), pick(self.head_bias),
                     self.arc_length)

    def with_dtype(self, dtype: torch.dtype) -> "Batch":
        """This batch with its potentials in `dtype`."""
        cast = (lambda t: None if t is None else t.to(dtype))
        return dataclasses.replace(self, span_pot=cast(self.span_pot),
                                   head_bias=cast(self.head_bias))


def make_batch(indices: Sequence[int], sentence_ids: Sequence[Sequence[int]],
               brackets: Sequence[Sequence[tuple[int, int]]] | None, dtype: torch.dtype,
               pieces: tuple[str, Sequence[Sequence[int]]] | None = None) -> Batch:
    """A `Batch` of the given sentences; `brackets` (per sentence, spans (i, j)) forbid every span
    that crosses one of them (Pereira & Schabes 1992); `pieces` (host side, per sentence the
    positions of `word_pieces.barred_positions`) forbid every span that cuts a bound piece from
    its host.

    Where the two disagree, the constraint wins: a bracket that cuts a bound piece from its host
    (`word_pieces.cuts_piece`) is left out, since in a binary tree a bracket no span crosses is
    a span of the tree, and the two together would leave the sentence no tree at all. What
    remains always holds a tree: inside every kept bracket (and the whole sentence), join its
    parts from the left with the host first (every span starts where the bracket does, never
    at a barred position), from the right with the host last."""
    ids, lengths = pad_ids([sentence_ids[i] for i in indices])             # (B, N), (B,)
    n = ids.shape[1]
    span_pot = None
    if brackets is not None and any(brackets[i] for i in indices):
        span_pot = torch.zeros(len(indices), n + 1, n + 1, dtype=dtype)
        for b, i in enumerate(indices):
            barred = set() if pieces is None else set(pieces[1][i])
            for start, end in brackets[i]:
                if pieces is not None and cuts_piece(pieces[0], barred, start, end):
                    continue
                span_pot[b] = span_pot[b].masked_fill(crossing_mask(start, end, n), NEG_INF)
    if pieces is not None and any(pieces[1][i] for i in indices):
        pot = piece_mask(pieces[0], [pieces[1][i] for i in indices], n, dtype)
        span_pot = pot if span_pot is None else span_pot + pot
    return Batch(list(indices), ids, lengths, span_pot)


def edge_bias(lengths: Tensor, n: int, right_edge: float, left_edge: float,
              dtype: torch.dtype) -> Tensor:
    """(B, n+1, n+1) [start, width] log-potentials of the structural bias: `right_edge` on spans
    (i, len) with i > 0, `left_edge` on spans (0, j) with j < len (widths >= 2; the whole
    sentence and single words are never biased)."""
    start = torch.arange(n + 1)[None, :, None]
    width = torch.arange(n + 1)[None, None, :]
    end = start + width
    length = lengths[:, None, None]
    inner = (width >= 2) & (end <= length) & (width < length)
    pot = torch.zeros(len(lengths), n + 1, n + 1, dtype=dtype)
    pot = pot.masked_fill(inner & (end == length), right_edge)
    return pot.masked_fill(inner & (start == 0), left_edge)


def crossing_mask(a: int, b: int, n: int) -> Tensor:
    """(n+1, n+1) [start, width]: True for spans (i, i+width) that cross the bracket (a, b), that
    is overlap it without either containing the other."""
    start = torch.arange(n + 1)[:, None]
    end = start + torch.arange(n + 1)[None, :]
    return ((start < a) & (a < end) & (end < b)) | ((a < start) & (start < b) & (b < end))


@dataclass
class ExpectedCounts:
    """Expected rule counts summed over sentences, with the log-likelihood they came with.
    Independent productions (`IndependentRules`) count their two factors, never the rules
    they imply: binary is then (NT, 2, S), [A, 0, B] the expected uses of B as A's left child
    and [A, 1, C] of C as its right child."""
    root: Tensor        # (NT,)
    binary: Tensor      # (NT, S, S), or (NT, 2, S) for independent productions
    lexical: Tensor     # (T, V)
    loglik: float       # sum of log Z over the parsed sentences
    words: int          # words of the parsed sentences
    sentences: int      # parsed sentences
    unparsed: int       # sentences with no tree under the rules (log Z = -inf)

    def scaled(self, factor: float) -> "ExpectedCounts":
        return ExpectedCounts(self.root * factor, self.binary * factor, self.lexical * factor,
                              self.loglik, self.words, self.sentences, self.unparsed)


def zero_counts(rules: RuleTensors | IndependentRules) -> ExpectedCounts:
    binary = torch.stack([rules.left, rules.right], 1) if isinstance(rules, IndependentRules) \
        else rules.binary
    return ExpectedCounts(torch.zeros_like(rules.root), torch.zeros_like(binary),
                          torch.zeros_like(rules.lexical), 0.0, 0, 0, 0)


class DivergedError(RuntimeError):
    """A NaN or +inf appeared where a log-likelihood or parameter should be."""


def expected_counts(root: Tensor, binary: Tensor, lexical: Tensor, ids: Tensor,
                    lengths: Tensor, span_pot: Tensor | None = None,
                    nonterminals_emit: bool = False) -> ExpectedCounts:
    """The E-step of one batch: expected rule counts from the engine's posteriors, and the
    log-likelihood. The one E-step of training (`batch_counts`) and of refinement from text
    (`refine.text.text_estep`).

    root (NT,), binary (NT, S, S): log-probabilities (or VB log-weights).
    lexical: (T, V) word rules of the preterminals, or (S, V) of every symbol, whose
        nonterminal rows are read only when `nonterminals_emit` (a refined grammar's may be).
    ids (B, N), lengths (B,): the sentences, -1 for a word with no entry (its sentence gets no
        tree); padding ids are never read.
    span_pot: (B, N+1, N+1) [start, width] span log-potentials, or None.
    The lexical counts have the shape of `lexical`.
    """
    return _expected_counts(root, binary, lexical, ids, lengths, span_pot, nonterminals_emit)[0]


def _expected_counts(root: Tensor, binary: Tensor, lexical: Tensor, ids: Tensor,
                     lengths: Tensor, span_pot: Tensor | None = None,
                     nonterminals_emit: bool = False) -> tuple[ExpectedCounts, Tensor]:
    """`expected_counts`, and the batch's log Z (B,)."""
    nt = binary.shape[0]
    every_symbol = lexical.shape[0] == binary.shape[1]
    enc = encode_ids(lexical, ids, lengths, num_nt=nt if every_symbol else 0,
                     nt_emit=nonterminals_emit)       # terminal (B, N, T), nt_terminal (B, N, NT)
    post = engine.posteriors(root, binary, enc.terminal, lengths, enc.nt_terminal,
                             span_pot=span_pot)
    logz = post.logz                                                       # (B,)
    if bool(torch.isnan(logz).any() | (logz == float("inf")).any()):
        raise DivergedError("the log-likelihood of a batch is NaN or infinite")
    parsed = torch.isfinite(logz)
    mask = torch.arange(ids.shape[1])[None, :] < lengths[:, None]       # (B, N)
    words = enc.ids[mask]                        # word ids, 0 for a word with no entry
    counts = torch.zeros_like(lexical)                                     # (T or S, V)
    (counts[nt:] if every_symbol else counts).index_add_(
        1, words, post.terminal[mask].T.to(counts.dtype))
    if nonterminals_emit:
        counts[:nt].index_add_(1, words, post.nt_terminal[mask].T.to(counts.dtype))
    return ExpectedCounts(post.root.sum(0), post.binary, counts,
                          float(logz[parsed].sum()), int(lengths[parsed].sum()),
                          int(parsed.sum()), int((~parsed).sum())), logz


def batch_counts(rules: RuleTensors | IndependentRules, batch: Batch) -> ExpectedCounts:
    """Expected counts of one batch under `rules` (log-probabilities, or VB log-weights): the
    E-step of training.

    In float32 the pass runs with subnormal numbers (below 1.2e-38) flushed to zero. As EM
    sharpens a grammar, rules and chart cells fall into that range, and some processors take
    a slow path on every operation that meets one: on an Intel Xeon with AVX-512 an E-step of a
    trained 30/60 grammar took 8 times as long unflushed (README, "Subnormal numbers and the
    training rate"). A cell is scaled by its largest entry, so what flushing drops is mostly far
    below float32's rounding of the sums it would join; where much of a sentence's mass runs
    through such values it loses that part (DEVELOPERS.md). A sentence that flushing leaves
    with no tree at all is counted again in float64, where those values are normal numbers
    (unflushed float32 would count it, but its counts of the subnormal rules come out wrong).
    The dev likelihood, the decoders and float64 runs never flush."""
    count = _independent_counts if isinstance(rules, IndependentRules) else _tabular_counts
    if rules.root.dtype != torch.float32:
        return count(rules, batch)[0]
    with flushed_subnormals():
        counts, logz = count(rules, batch)
    lost = ~torch.isfinite(logz)
    if not bool(lost.any()):
        return counts
    again = _as_dtype(count(type(rules)(*(t.double() for t in rules)),
                            batch.subset(lost).with_dtype(torch.float64))[0], torch.float32)
    return dataclasses.replace(add_counts(counts, again), unparsed=again.unparsed)


def _as_dtype(counts: ExpectedCounts, dtype: torch.dtype) -> ExpectedCounts:
    return dataclasses.replace(counts, root=counts.root.to(dtype),
                               binary=counts.binary.to(dtype), lexical=counts.lexical.to(dtype))


def _tabular_counts(rules: RuleTensors, batch: Batch) -> tuple[ExpectedCounts, Tensor]:
    return _expected_counts(rules.root, rules.binary, rules.lexical, batch.ids, batch.lengths,
                            batch.span_pot)


def _flushing() -> bool:
    """Whether this thread flushes subnormal float32 numbers to zero now (torch has no
    getter: 1e-39 is subnormal in float32, so it reads back as 0 only when flushed)."""
    return float(torch.tensor([1e-39], dtype=torch.float32).mul_(1.0)) == 0.0


@contextlib.contextmanager
def flushed_subnormals() -> Iterator[None]:
    """Subnormal floats flushed to zero on this thread inside the block (where the processor
    can: `torch.set_flush_denormal`), and the previous mode restored after it."""
    before = _flushing()
    torch.set_flush_denormal(True)
    try:
        yield
    finally:
        torch.set_flush_denormal(before)


def independent_counts(rules: IndependentRules, batch: Batch) -> ExpectedCounts:
    """The E-step of independent productions: the expected counts of the root, of each
    factor's outcomes and of the words, as the gradient of the batch's log Z with respect to
    their log-probabilities (Eisner 2016, "Inside-Outside and Forward-Backward Algorithms Are
    Just Backprop"), through `engine.independent`, without forming the (NT, S, S) rules. The
    left factor's count of (A, B) is the expected number of rules A -> B C over every C, and
    likewise on the right."""
    return _independent_counts(rules, batch)[0]


def _independent_counts(rules: IndependentRules, batch: Batch
                        ) -> tuple[ExpectedCounts, Tensor]:
    """`independent_counts`, and the batch's log Z (B,)."""
    leaves = [x.detach().requires_grad_() for x in (rules.root, rules.left, rules.right,
                                                     rules.lexical)]
    with torch.enable_grad():
        factored = IndependentRules(*leaves)
        terminal = encode_ids(factored.lexical, batch.ids, batch.lengths).terminal  # (B, N, T)
        logz = factored.log_partition(terminal, batch.lengths, span_pot=batch.span_pot)
        if bool(torch.isnan(logz).any() | (logz == float("inf")).any()):
            raise DivergedError("the log-likelihood of a batch is NaN or infinite")
        parsed = torch.isfinite(logz)
        grads = torch.autograd.grad(logz[parsed].sum(), leaves, allow_unused=True) \
            if bool(parsed.any()) else [None] * 4
    root, left, right, lexical = (torch.zeros_like(x) if g is None else g.detach()
                                  for g, x in zip(grads, leaves))
    logz = logz.detach()
    return ExpectedCounts(root, torch.stack([left, right], 1), lexical,
                          float(logz[parsed].sum()), int(batch.lengths[parsed].sum()),
                          int(parsed.sum()), int((~parsed).sum())), logz


def add_counts(total: ExpectedCounts, part: ExpectedCounts) -> ExpectedCounts:
    return ExpectedCounts(total.root + part.root, total.binary + part.binary,
                          total.lexical + part.lexical, total.loglik + part.loglik,
                          total.words + part.words, total.sentences + part.sentences,
                          total.unparsed + part.unparsed)


def sentence_logliks(rules: RuleTensors | LowRankRules, batch: Batch) -> Tensor:
    """(B,) log p(sentence) under `rules`, no gradient."""
    return RulesScorer(rules).log_likelihood(batch.ids, batch.lengths)


def log_partition_of(rules: RuleTensors | LowRankRules, terminal: Tensor, lengths: Tensor,
                     span_pot: Tensor | None = None) -> Tensor:
    """(B,) log Z under dense or factored rules, through the kernel the rules name."""
    return rules.log_partition(terminal, lengths, span_pot=span_pot)
