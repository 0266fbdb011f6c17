"""Small seeded random grammars for the engine tests (test-only helpers)."""

from __future__ import annotations

import torch

from treewright.grammar import Grammar
from treewright.vocab import Vocabulary


def random_grammar(nt: int, t: int, v: int, seed: int, nt_emit: bool = False,
                   sparsity: float = 0.0, names: tuple[list[str], list[str]] | None = None
                   ) -> Grammar:
    """A normalised grammar with names N0.. (nonterminals), P0.. (preterminals), words w0..

    `nt_emit` gives nonterminals lexical rules too (general CNF); `sparsity` zeroes that
    fraction of binary rules (keeping at least one per left-hand side); `names` gives the
    nonterminal and preterminal names instead of N0.. and P0..."""
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    dt = torch.float64
    root = torch.rand(nt, generator=gen, dtype=dt) + 0.1
    binary = torch.rand(nt, s, s, generator=gen, dtype=dt) + 0.05
    if sparsity:
        drop = torch.rand(nt, s, s, generator=gen) < sparsity
        drop[:, 0, 0] = False
        binary = binary.masked_fill(drop, 0.0)
    lexical = torch.rand(s, v, generator=gen, dtype=dt) + 0.05
    if not nt_emit:
        lexical[:nt] = 0.0
    totals = binary.flatten(1).sum(1) + lexical[:nt].sum(1)
    binary = binary / totals[:, None, None]
    lexical[:nt] = lexical[:nt] / totals[:, None]
    lexical[nt:] = lexical[nt:] / lexical[nt:].sum(1, keepdim=True)
    root = root / root.sum()
    nonterminals, preterminals = names or ([f"N{i}" for i in range(nt)],
                                           [f"P{i}" for i in range(t)])
    return Grammar(list(nonterminals), list(preterminals),
                   Vocabulary([f"w{i}" for i in range(v)], unk=None),
                   root.log(), binary.log(), lexical.log(), start="TOP")
