"""The slow, obviously correct inside pass: log space, one width at a time, every symbol pair.

For each span width it materialises (B, spans, splits, S, S), reduces over split points, then over
the rules, in a semiring given by its reduction: log-sum-exp (probabilities) or max (Viterbi)
(Goodman 1999, "Semiring Parsing"). Gradients come from plain autograd. It exists to check the
fast engine and to be the baseline of `scripts/bench_inside.py`; nothing else should call it.
"""

from __future__ import annotations

import torch
from torch import Tensor


def _reduce(x: Tensor, dims, semiring: str) -> Tensor:
    if semiring == "log":
        return torch.logsumexp(x, dim=dims)
    if semiring == "max":
        for d in sorted(dims, reverse=True):
            x = x.max(dim=d).values
        return x
    raise ValueError(f"unknown semiring {semiring!r}")


def reference_inside(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
                     nt_terminal: Tensor | None = None, span_pot: Tensor | None = None,
                     semiring: str = "log") -> Tensor:
    """Same contract as `engine.inside.log_partition` (log Z per sentence), any semiring."""
    B, N, T = terminal.shape
    NT = binary.shape[0]
    S = NT + T
    if root.dim() == 1:
        root = root.expand(B, -1)
    # Impossible items get a large finite negative score instead of -inf: exp() of it is exactly
    # zero, and the gradient of a reduction over nothing but impossible items stays finite.
    floor = -1e4
    root, binary, terminal = (x.clamp(min=floor) for x in (root, binary, terminal))
    if nt_terminal is not None:
        nt_terminal = nt_terminal.clamp(min=floor)
    if span_pot is not None:
        span_pot = span_pot.clamp(min=floor)
    # chart[w][b, i, A] for span (i, i+w), over all S symbols.
    width_one = torch.cat([nt_terminal if nt_terminal is not None
                           else terminal.new_full((B, N, NT), floor), terminal], -1)
    chart = {1: width_one}
    rules = binary.reshape(NT, S * S)
    for w in range(2, N + 1):
        P = N - w + 1
        splits = []
        for u in range(1, w):
            left = chart[u][:, 0:P]               # (B, P, S)
            right = chart[w - u][:, u:u + P]      # (B, P, S)
            splits.append(left[..., :, None] + right[..., None, :])
        pairs = torch.stack(splits, 2)            # (B, P, w-1, S, S)
        pairs = _reduce(pairs, (2,), semiring).reshape(B, P, 1, S * S)
        nts = _reduce(pairs + rules, (3,), semiring)  # (B, P, NT)
        if span_pot is not None:
            nts = nts + span_pot[:, 0:P, w, None]
        chart[w] = torch.cat([nts, terminal.new_full((B, P, T), floor)], -1)
    lengths = torch.as_tensor(lengths)
    out = []
    for b in range(B):
        top = chart[int(lengths[b])][b, 0, :NT]
        out.append(_reduce(top + root[b], (0,), semiring))
    return torch.stack(out)
