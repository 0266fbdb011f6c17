"""Refinement from raw text: inside-outside over sentences, where the tree and the
subcategories are both latent, on the dense fine grammar through the engine's posteriors.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.corpus.batching import length_batches
from treewright.grammar import coarse_name
from treewright.inference import encode_ids, pad_ids
from treewright.refine.latent import LatentGrammar
from treewright.train.estep import add_counts, expected_counts, zero_counts
from treewright.trees import Tree



@dataclass
class TextEStep:
    """Expected counts in the grammar's rule blocks, and the log-likelihood of the sentences
    that parse (`unparsed` counts the others)."""
    loglik: float
    binary: Tensor
    lexical: Tensor
    root: Tensor
    unparsed: int


def text_estep(lg: LatentGrammar, ids: Sequence[Sequence[int]], batch_size: int = 32
               ) -> TextEStep:
    """One E-step over sentences given as vocabulary ids (-1: a word with no entry), through
    training's E-step (`train.estep.expected_counts`) on the dense fine grammar."""
    fine = lg.to_grammar(torch.float64)
    total = zero_counts(fine)
    for batch in length_batches([len(s) for s in ids], batch_size):
        table, lengths = pad_ids([ids[i] for i in batch])                  # (B, N), (B,)
        total = add_counts(total, expected_counts(
            fine.root, fine.binary, fine.lexical, table, lengths,
            nonterminals_emit=fine.nonterminals_emit))
    b, l, r = lg.dense_counts(total.binary, total.lexical, total.root)
    return TextEStep(total.loglik, b, l, r, total.unparsed)


def text_loglik(lg: LatentGrammar, ids: Sequence[Sequence[int]], batch_size: int = 32
                ) -> tuple[float, int, int]:
    """(log-likelihood of the sentences that parse, number that do not, words of those that
    parse); per-word figures divide by the last, so unparsed sentences do not flatter them."""
    fine = lg.to_grammar(torch.float64)
    nt_f = len(fine.nonterminals)
    total, unparsed, words = 0.0, 0, 0
    with torch.no_grad():
        for batch in length_batches([len(s) for s in ids], batch_size):
            table, lengths = pad_ids([ids[i] for i in batch])              # (B, N), (B,)
            enc = encode_ids(fine.lexical, table, lengths, nt_f, fine.nonterminals_emit)
            logz = engine.log_partition(fine.root, fine.binary, enc.terminal, lengths,
                                        enc.nt_terminal)
            ok = torch.isfinite(logz)
            total += float(logz[ok].sum())
            unparsed += int((~ok).sum())
            words += int(lengths[ok].sum())
    return total, unparsed, words


def project_labels(tree: Tree) -> Tree:
    """A copy of `tree` with every NAME·k label replaced by NAME."""
    top = Tree(coarse_name(tree.label))
    stack = [(tree, top)]
    while stack:
        old, new = stack.pop()
        for child in old.children:
            if isinstance(child, Tree):
                copy = Tree(coarse_name(child.label))
                new.children.append(copy)
                stack.append((child, copy))
            else:
                new.children.append(child)
    return top
