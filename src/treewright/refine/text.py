"""Refinement from raw text: inside-outside over sentences, where the tree and the
subcategories are both latent, on the dense fine grammar through the engine's posteriors.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.grammar import Grammar
from treewright.corpus.batching import length_batches
from treewright.refine.latent import LatentGrammar, coarse_name
from treewright.train.estep import add_counts, expected_counts, zero_counts
from treewright.trees import Tree

NEG_INF = float("-inf")


@dataclass
class TextEStep:
    """Expected counts in the grammar's rule blocks, and the log-likelihood of the sentences
    that parse (`unparsed` counts the others)."""
    loglik: float
    binary: Tensor
    lexical: Tensor
    root: Tensor
    unparsed: int


def _batch_ids(ids: Sequence[Sequence[int]]) -> tuple[Tensor, Tensor, Tensor]:
    """Word ids (B, N) (padding and words with no entry: 0), which have no entry (B, N), and
    the lengths (B,)."""
    B, N = len(ids), max(len(s) for s in ids)
    table = torch.zeros(B, N, dtype=torch.long)
    missing = torch.zeros(B, N, dtype=torch.bool)
    for b, row in enumerate(ids):
        for k, w in enumerate(row):
            table[b, k] = max(w, 0)
            missing[b, k] = w < 0
    return table, missing, torch.tensor([len(s) for s in ids])


def _batch_inputs(fine: Grammar, ids: Sequence[Sequence[int]]):
    table, missing, lengths = _batch_ids(ids)
    scores = fine.lexical[:, table].permute(1, 2, 0)                        # (B, N, Sf)
    scores = scores.masked_fill(missing[..., None], NEG_INF)
    return table, scores, lengths


def text_estep(lg: LatentGrammar, ids: Sequence[Sequence[int]], batch_size: int = 32
               ) -> TextEStep:
    """One E-step over sentences given as vocabulary ids (-1: a word with no entry), through
    training's E-step (`train.estep.expected_counts`) on the dense fine grammar."""
    fine = lg.to_grammar(torch.float64)
    total = zero_counts(fine)
    for batch in length_batches([len(s) for s in ids], batch_size):
        table, missing, lengths = _batch_ids([ids[i] for i in batch])
        total = add_counts(total, expected_counts(
            fine.root, fine.binary, fine.lexical, table, lengths, missing=missing,
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
            _, scores, lengths = _batch_inputs(fine, [ids[i] for i in batch])
            logz = engine.log_partition(fine.root, fine.binary, scores[..., nt_f:].contiguous(),
                                        lengths, scores[..., :nt_f].contiguous()
                                        if fine.nonterminals_emit else None)
            ok = torch.isfinite(logz)
            total += float(logz[ok].sum())
            unparsed += int((~ok).sum())
            words += int(lengths[ok].sum())
    return total, unparsed, words


def viterbi_coarse_trees(lg: LatentGrammar, words: Sequence[Sequence[str]]) -> list[Tree]:
    """The most probable fine tree of each sentence with its labels projected to the coarse
    symbols (sentences with no parse are left out). The merge step of the text start estimates
    its losses on these trees, the most probable stand-ins for the unobserved ones."""
    from treewright.decode import decode

    fine = lg.to_grammar(torch.float64)
    out = []
    for result in decode(fine, words, "viterbi"):
        if result.tree is not None:
            out.append(project_labels(result.tree))
    return out


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
