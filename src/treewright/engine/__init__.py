"""The inside engine: log Z, expected counts, span marginals, Viterbi trees and posterior samples.

It takes rule log-probabilities as tensors and knows nothing of files, configs or where the
numbers came from (tabular, neural and low-rank parameterizations all feed it the same way).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from treewright.engine.inside import (Chart, SpanTables, every_row, inside_chart,
                                      log_partition, log_unscaled, span_tables)
from treewright.engine.sample import sample_trees
from treewright.engine.viterbi import viterbi

__all__ = ["Chart", "Posteriors", "SpanTables", "every_row", "inside_chart", "log_partition",
           "log_unscaled", "posteriors", "sample_trees", "span_tables", "viterbi"]


@dataclass
class Posteriors:
    """Expected counts and marginals of one batch, summed over sentences where noted."""
    logz: Tensor                 # (B,)
    root: Tensor                 # (B, NT)  p(top symbol | sentence)
    binary: Tensor               # (NT, S, S) expected rule counts, summed over the batch;
                                 # (B, NT, S, S), per sentence, when the rules are per sentence
    terminal: Tensor             # (B, N, T) p(preterminal at position | sentence)
    nt_terminal: Tensor | None   # (B, N, NT) for grammars whose nonterminals emit words
    spans: Tensor                # (B, N+1, N+1) p(span [start, width] is a constituent)


def posteriors(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
               nt_terminal: Tensor | None = None, span_pot: Tensor | None = None) -> Posteriors:
    """The E-step: every posterior quantity as a gradient of sum log Z (Eisner 2016).

    Sentences with no parse contribute nothing (their log Z is -inf and they are left out of the
    sum that is differentiated).
    """
    B, N, _ = terminal.shape
    if root.dim() == 1:
        root = root.expand(B, -1)
    if span_pot is None:
        span_pot = terminal.new_zeros(B, N + 1, N + 1)
    leaves = [x.detach().requires_grad_() if x is not None else None
              for x in (root, binary, terminal, nt_terminal, span_pot)]
    with torch.enable_grad():
        logz = log_partition(leaves[0], leaves[1], leaves[2], lengths, leaves[3], leaves[4])
        ok = torch.isfinite(logz)
        total = torch.where(ok, logz, torch.zeros_like(logz)).sum()
        wanted = [x for x in leaves if x is not None]
        grads = iter(torch.autograd.grad(total, wanted, allow_unused=True))
    g = [next(grads) if x is not None else None for x in leaves]
    g = [torch.zeros_like(x) if gx is None and x is not None else gx for x, gx in zip(leaves, g)]
    return Posteriors(logz.detach(), g[0], g[1], g[2], g[3], g[4])
