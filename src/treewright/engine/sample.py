"""Trees sampled from the posterior p(tree | sentence), top-down from the sum-semiring chart.

Forward filtering, backward sampling: the inside chart of `engine.inside` gives every span's
inside scores; a tree is drawn from the top, choosing at each span a split and two children in
proportion to rule probability times the children's inside scores. A node costs O(w S^2), so a
tree costs O(n^2 S^2), far below the O(n^3) chart.
"""

from __future__ import annotations

import torch
from torch import Tensor

from treewright.engine.inside import inside_chart, log_partition

NEG_INF = float("-inf")


def sample_trees(root: Tensor, binary: Tensor, terminal: Tensor, lengths: Tensor,
                 num_samples: int = 1, nt_terminal: Tensor | None = None,
                 span_pot: Tensor | None = None, generator: torch.Generator | None = None
                 ) -> list[list[list[tuple[int, int, int]]] | None]:
    """`num_samples` trees per sentence (arguments as in `engine.inside.log_partition`).

    Returns per sentence a list of trees, each as spans (start, end, symbol) in pre-order, or None
    when the sentence has no parse.
    """
    B, N, T = terminal.shape
    if binary.dim() != 3:
        raise ValueError("sample_trees takes one grammar for the batch, binary (NT, S, S); rules "
                         "per sentence are supported by log_partition only")
    NT = binary.shape[0]
    if root.dim() == 1:
        root = root.expand(B, -1)
    lengths = torch.as_tensor(lengths, dtype=torch.long)
    with torch.no_grad():
        logz = log_partition(root, binary, terminal, lengths, nt_terminal, span_pot)
        pad = torch.arange(N)[None, :] >= lengths[:, None]
        terminal = terminal.masked_fill(pad[..., None], 0.0)
        if nt_terminal is not None:
            nt_terminal = nt_terminal.masked_fill(pad[..., None], 0.0)
        chart = inside_chart(binary, terminal, nt_terminal, span_pot)
        out: list[list[list[tuple[int, int, int]]] | None] = []
        for b in range(B):
            if not torch.isfinite(logz[b]):
                out.append(None)
                continue
            n = int(lengths[b])
            out.append([_draw(chart, binary, root[b], b, n, NT, generator)
                        for _ in range(num_samples)])
    return out


def _child_scores(chart, b: int, start: int, width: int, NT: int) -> Tensor:
    """(S,) log inside scores of every symbol over one span (preterminals only at width one)."""
    nts = chart.log_inside(start, width, b) if width >= chart.min_width else \
        chart.term.new_full((NT,), NEG_INF)
    if width == 1:
        return torch.cat([nts, chart.log_term(start, b)])
    return torch.cat([nts, chart.term.new_full((chart.term.shape[-1],), NEG_INF)])


def _categorical(logits: Tensor, generator) -> int:
    probs = torch.softmax(logits.flatten().double(), 0)
    return int(torch.multinomial(probs, 1, generator=generator))


def _draw(chart, binary, root, b, n, NT, generator) -> list[tuple[int, int, int]]:
    tops = _child_scores(chart, b, 0, n, NT)[:NT] + root
    spans = []
    stack = [(0, n, _categorical(tops, generator))]
    while stack:
        i, j, sym = stack.pop()
        spans.append((i, j, sym))
        w = j - i
        if w == 1:
            continue
        lefts = torch.stack([_child_scores(chart, b, i, u, NT) for u in range(1, w)])
        rights = torch.stack([_child_scores(chart, b, i + u, w - u, NT) for u in range(1, w)])
        logits = binary[sym][None] + lefts[:, :, None] + rights[:, None, :]  # (w-1, S, S)
        pick = _categorical(logits, generator)
        S = logits.shape[-1]
        u, rest = divmod(pick, S * S)
        left, right = divmod(rest, S)
        stack.append((i + u + 1, j, right))
        stack.append((i, i + u + 1, left))
    return spans
