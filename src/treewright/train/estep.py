"""The E-step: expected rule counts of a batch of sentences, from the engine's posteriors.

Sentences are held as word-id tensors; the terminal scores the engine needs are gathered from the
lexical rules, and lexical expected counts are the terminal marginals scattered back to word ids.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.engine.lowrank import lowrank_log_partition
from treewright.params.compound import CompoundRules
from treewright.params.lowrank import LowRankRules
from treewright.params.tabular import RuleTensors

NEG_INF = float("-inf")


@dataclass
class Batch:
    """Sentences of one engine call."""
    indices: list[int]          # positions in the training (or dev) sentence list
    ids: Tensor                 # (B, N) word ids; padding is id 0
    lengths: Tensor             # (B,)
    span_pot: Tensor | None     # (B, N+1, N+1) 0 or -inf per span [start, width]; None: free

    @property
    def words(self) -> int:
        return int(self.lengths.sum())


def make_batch(indices: Sequence[int], sentence_ids: Sequence[Sequence[int]],
               brackets: Sequence[Sequence[tuple[int, int]]] | None, dtype: torch.dtype) -> Batch:
    """A `Batch` of the given sentences; `brackets` (per sentence, spans (i, j)) forbid every span
    that crosses one of them (Pereira & Schabes 1992)."""
    lengths = torch.tensor([len(sentence_ids[i]) for i in indices])
    n = int(lengths.max())
    ids = torch.zeros(len(indices), n, dtype=torch.long)
    for b, i in enumerate(indices):
        ids[b, :len(sentence_ids[i])] = torch.tensor(sentence_ids[i], dtype=torch.long)
    span_pot = None
    if brackets is not None and any(brackets[i] for i in indices):
        span_pot = torch.zeros(len(indices), n + 1, n + 1, dtype=dtype)
        for b, i in enumerate(indices):
            for start, end in brackets[i]:
                span_pot[b] = span_pot[b].masked_fill(crossing_mask(start, end, n), NEG_INF)
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


def terminal_scores(lexical: Tensor, ids: Tensor) -> Tensor:
    """(B, N, T) log p(preterminal -> word at position) from lexical (T, V) and ids (B, N)."""
    return lexical[:, ids].permute(1, 2, 0)


@dataclass
class ExpectedCounts:
    """Expected rule counts summed over sentences, with the log-likelihood they came with."""
    root: Tensor        # (NT,)
    binary: Tensor      # (NT, S, S)
    lexical: Tensor     # (T, V)
    loglik: float       # sum of log Z over the parsed sentences
    words: int          # words of the parsed sentences
    sentences: int      # parsed sentences
    unparsed: int       # sentences with no tree under the rules (log Z = -inf)

    def scaled(self, factor: float) -> "ExpectedCounts":
        return ExpectedCounts(self.root * factor, self.binary * factor, self.lexical * factor,
                              self.loglik, self.words, self.sentences, self.unparsed)


def zero_counts(rules: RuleTensors) -> ExpectedCounts:
    return ExpectedCounts(torch.zeros_like(rules.root), torch.zeros_like(rules.binary),
                          torch.zeros_like(rules.lexical), 0.0, 0, 0, 0)


class DivergedError(RuntimeError):
    """A NaN or +inf appeared where a log-likelihood or parameter should be."""


def batch_counts(rules: RuleTensors, batch: Batch) -> ExpectedCounts:
    """Expected counts of one batch under `rules` (log-probabilities, or VB log-weights)."""
    terminal = terminal_scores(rules.lexical, batch.ids)                 # (B, N, T)
    post = engine.posteriors(rules.root, rules.binary, terminal, batch.lengths,
                             span_pot=batch.span_pot)
    logz = post.logz                                                       # (B,)
    if bool(torch.isnan(logz).any() | (logz == float("inf")).any()):
        raise DivergedError("the log-likelihood of a batch is NaN or infinite")
    parsed = torch.isfinite(logz)
    mask = torch.arange(batch.ids.shape[1])[None, :] < batch.lengths[:, None]   # (B, N)
    lexical = torch.zeros_like(rules.lexical)                               # (T, V)
    lexical.index_add_(1, batch.ids[mask], post.terminal[mask].T.to(lexical.dtype))
    return ExpectedCounts(post.root.sum(0), post.binary, lexical,
                          float(logz[parsed].sum()), int(batch.lengths[parsed].sum()),
                          int(parsed.sum()), int((~parsed).sum()))


def add_counts(total: ExpectedCounts, part: ExpectedCounts) -> ExpectedCounts:
    return ExpectedCounts(total.root + part.root, total.binary + part.binary,
                          total.lexical + part.lexical, total.loglik + part.loglik,
                          total.words + part.words, total.sentences + part.sentences,
                          total.unparsed + part.unparsed)


def sentence_logliks(rules: RuleTensors | LowRankRules, batch: Batch) -> Tensor:
    """(B,) log p(sentence) under `rules`, no gradient."""
    with torch.no_grad():
        terminal = terminal_scores(rules.lexical, batch.ids)
        return log_partition_of(rules, terminal, batch.lengths)


def log_partition_of(rules: RuleTensors | LowRankRules, terminal: Tensor, lengths: Tensor,
                     span_pot: Tensor | None = None) -> Tensor:
    """(B,) log Z under dense or factored rules, through the matching engine kernel."""
    if isinstance(rules, LowRankRules):
        return lowrank_log_partition(rules.root, rules.u, rules.v, rules.w, terminal, lengths,
                                     span_pot=span_pot)
    return engine.log_partition(rules.root, rules.binary, terminal, lengths, span_pot=span_pot)


def sentence_terminal_scores(lexical: Tensor, ids: Tensor) -> Tensor:
    """(B, N, T) from per-sentence lexical rules (B, T, V) and ids (B, N)."""
    B, T, _ = lexical.shape
    return torch.gather(lexical, 2, ids[:, None, :].expand(B, T, ids.shape[1])).transpose(1, 2)


def compound_log_partition(rules: CompoundRules, ids: Tensor, lengths: Tensor,
                           span_pot: Tensor | None = None) -> Tensor:
    """(B,) log p(x_b | z_b), each sentence under its own rules, in one engine call."""
    terminal = sentence_terminal_scores(rules.lexical, ids)              # (B, N, T)
    return engine.log_partition(rules.root, rules.binary, terminal, lengths, span_pot=span_pot)


def compound_span_posteriors(rules: CompoundRules, ids: Tensor, lengths: Tensor
                             ) -> tuple[Tensor, Tensor]:
    """log p(x_b | z_b) (B,) and span marginals (B, N+1, N+1), each sentence under its own
    rules, in one engine call."""
    terminal = sentence_terminal_scores(rules.lexical, ids).detach()
    post = engine.posteriors(rules.root.detach(), rules.binary.detach(), terminal, lengths)
    return post.logz, post.spans


def span_posteriors(rules: RuleTensors | LowRankRules, terminal: Tensor, lengths: Tensor
                    ) -> tuple[Tensor, Tensor]:
    """log Z (B,) and the posterior span marginals (B, N+1, N+1), [b, start, width], as the
    gradient of log Z with respect to a zero span potential (Eisner 2016)."""
    B, N, _ = terminal.shape
    pot = terminal.new_zeros(B, N + 1, N + 1, requires_grad=True)
    with torch.enable_grad():
        detached = type(rules)(*(x.detach() for x in rules))
        logz = log_partition_of(detached, terminal.detach(), lengths, span_pot=pot)
        ok = torch.isfinite(logz)
        (spans,) = torch.autograd.grad(torch.where(ok, logz, torch.zeros_like(logz)).sum(), pot)
    return logz.detach(), spans
