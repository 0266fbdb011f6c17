"""A memory budget for applying a grammar to sentences (scoring, parsing, evaluating).

One inside pass over a sentence of n words holds charts of about n^2 x NT numbers and split
weights of about n^3 / 6 (`engine.memory` has the exact count): a 10,000-word line needs tens of
GB and hours. Training cuts its batches to `train.memory_budget_mb`; these functions do the same
for a grammar applied to text. Sentences that fit are run in calls that each fit the budget;
a sentence that alone needs more is not run, and its index is returned so that the caller keeps
its line in the output and names it (`treewright score` and `parse` do).

    plan = plan_budget(grammar, [len(s) for s in sentences], budget_mb=512)
    scores = score_within_budget(grammar, sentences, budget_mb=512)   # None where over budget
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Sequence, TypeVar

import torch

from treewright.corpus.batching import DECODE_BATCH, length_batches
from treewright.engine.memory import inside_outside_bytes
from treewright.grammar import Grammar

R = TypeVar("R")

# What the commands allow one call by default: room for a few-hundred-word sentence under a
# demo-sized grammar, far below the memory of any machine the project runs on.
DEFAULT_BUDGET_MB = 2048.0

MB = 2 ** 20


def call_bytes(grammar: Grammar, batch: int, length: int,
               dtype: torch.dtype = torch.float32) -> int:
    """Estimated peak bytes of one inside-outside call on `batch` sentences padded to `length`
    words (forward and backward, `engine.memory.inside_outside_bytes`; a forward-only score
    needs less, so the estimate errs on the safe side)."""
    return inside_outside_bytes(batch, length, len(grammar.nonterminals),
                                len(grammar.preterminals), torch.finfo(dtype).bits // 8)


def sentence_bytes(grammar: Grammar, length: int, dtype: torch.dtype = torch.float32) -> int:
    """`call_bytes` of one sentence alone."""
    return call_bytes(grammar, 1, length, dtype)


@dataclass
class BudgetPlan:
    """How sentences of given lengths are run under a budget.

    groups: sentence indices per call, each call within the budget (similar lengths together).
    over: indices of the sentences that alone need more than the budget, in input order.
    longest: the most words a sentence may have to fit (math.inf without a budget).
    budget_mb: the budget in MiB (None: no budget).
    """
    groups: list[list[int]]
    over: list[int]
    longest: float
    budget_mb: float | None

    @classmethod
    def unbudgeted(cls, lengths: Sequence[int], group: int) -> "BudgetPlan":
        """Every sentence, in input order, in calls of `group` (no budget: for work whose
        memory no grammar file sizes, such as a factored run's own model)."""
        count = len(lengths)
        return cls([list(range(k, min(k + group, count))) for k in range(0, count, group)], [],
                   max(lengths, default=0), None)


def longest_within(grammar: Grammar, budget_mb: float | None,
                   dtype: torch.dtype = torch.float32) -> float:
    """The most words one sentence may have for its pass to fit `budget_mb` (inf: no budget;
    0: not even one word fits)."""
    if budget_mb is None:
        return math.inf
    budget = budget_mb * MB
    # The cost grows with the length, so a doubling search then bisection finds the edge.
    if sentence_bytes(grammar, 1, dtype) > budget:
        return 0
    low, high = 1, 2
    while sentence_bytes(grammar, high, dtype) <= budget:
        low, high = high, high * 2
    while high - low > 1:
        middle = (low + high) // 2
        if sentence_bytes(grammar, middle, dtype) <= budget:
            low = middle
        else:
            high = middle
    return low


def plan_budget(grammar: Grammar | Sequence[Grammar], lengths: Sequence[int],
                budget_mb: float | None, dtype: torch.dtype = torch.float32,
                batch_size: int = 64) -> BudgetPlan:
    """Calls of at most `batch_size` sentences, each within `budget_mb` (see `BudgetPlan`).
    For several grammars (the consensus decoder's, which runs a call's sentences under one
    grammar at a time) a call fits when it fits under every one of them. Raises ValueError for
    a budget that is not positive."""
    if budget_mb is not None and not budget_mb > 0:
        raise ValueError(f"the memory budget must be positive, got {budget_mb} MB")
    grammars = [grammar] if isinstance(grammar, Grammar) else list(grammar)
    longest = min(longest_within(g, budget_mb, dtype) for g in grammars)
    fits = [i for i, n in enumerate(lengths) if n <= longest]
    over = [i for i, n in enumerate(lengths) if n > longest]
    # A call's cost is a fixed part (the engine's chunk buffers) plus one part per sentence;
    # both are taken at their largest over the grammars, which errs on the safe side.
    fixed = {id(g): call_bytes(g, 0, 1, dtype) for g in grammars}
    most_fixed = max(fixed.values())
    groups = length_batches([lengths[i] for i in fits], batch_size,
                            max_cost=None if budget_mb is None else budget_mb * MB - most_fixed,
                            cost=lambda n: max(sentence_bytes(g, n, dtype) - fixed[id(g)]
                                               for g in grammars)
                            ) if fits else []
    return BudgetPlan([[fits[k] for k in g] for g in groups], over, longest, budget_mb)


def run_plan(plan: BudgetPlan, sentences: Sequence[Sequence[str]],
             work: Callable[[list[Sequence[str]]], Sequence[R]],
             progress=None) -> list[R | None]:
    """`work(group of sentences)` per group of `plan`, results back in input order; None for
    the sentences over the budget. `sentences` may hold whatever `work` reads of each (its
    words, or its index into the caller's lists). `progress` (optional, a
    `tracking.Progress`) is advanced by each group's size."""
    out: list[R | None] = [None] * len(sentences)
    for group in plan.groups:
        for i, result in zip(group, work([sentences[i] for i in group])):
            out[i] = result
        if progress is not None:
            progress.update(len(group))
    return out


def score_within_budget(grammar: Grammar, sentences: Sequence[Sequence[str]],
                        budget_mb: float | None = DEFAULT_BUDGET_MB, batch_size: int = 64,
                        dtype: torch.dtype = torch.float32, progress=None):
    """`inference.score` of every sentence that fits `budget_mb`, None for the others."""
    from treewright.inference import score

    plan = plan_budget(grammar, [len(s) for s in sentences], budget_mb, dtype, batch_size)
    return run_plan(plan, sentences, lambda group: score(grammar, group, batch_size, dtype),
                    progress)


def decode_within_budget(grammar: Grammar, sentences: Sequence[Sequence[str]],
                         decoder: str = "mbr", budget_mb: float | None = DEFAULT_BUDGET_MB,
                         batch_size: int = DECODE_BATCH, dtype: torch.dtype = torch.float64,
                         progress=None, pieces=None, freed: list[int] | None = None,
                         tree_logprobs: bool = True):
    """`decode.decode` of every sentence that fits `budget_mb`, None for the others; with
    `pieces` (host side, barred positions per sentence) under the word-piece constraint, a
    sentence it leaves no tree decoded without it and its index added to `freed`
    (`decode.under_pieces`). `tree_logprobs` as for `decode.decode`."""
    from treewright.decode import decode

    plan = plan_budget(grammar, [len(s) for s in sentences], budget_mb, dtype, batch_size)
    return run_plan_under_pieces(
        plan, sentences, lambda group, p: decode(grammar, group, decoder, batch_size, dtype, p,
                                                 tree_logprobs=tree_logprobs),
        progress, pieces, freed)


def consensus_within_budget(grammars: Sequence[Grammar], sentences: Sequence[Sequence[str]],
                            budget_mb: float | None = DEFAULT_BUDGET_MB,
                            batch_size: int = DECODE_BATCH,
                            dtype: torch.dtype = torch.float64, progress=None, pieces=None,
                            freed: list[int] | None = None):
    """`decode.consensus` of every sentence that fits `budget_mb` under each of `grammars`,
    None for the others; `pieces` and `freed` as for `decode_within_budget`."""
    from treewright.decode import consensus

    plan = plan_budget(grammars, [len(s) for s in sentences], budget_mb, dtype, batch_size)
    return run_plan_under_pieces(
        plan, sentences, lambda group, p: consensus(grammars, group, batch_size, dtype, p),
        progress, pieces, freed)


def run_plan_under_pieces(plan: BudgetPlan, sentences, run, progress=None, pieces=None,
                          freed: list[int] | None = None):
    """`run_plan` of `run(group, pieces of the group)` through `decode.under_pieces`: with
    `pieces` (host side, barred positions per sentence) under the word-piece constraint, the
    indices of the sentences it left no tree, decoded without it, added to `freed`."""
    from treewright.decode import under_pieces

    def work(positions):
        results, lost = under_pieces(run, [sentences[k] for k in positions],
                                     None if pieces is None else
                                     (pieces[0], [pieces[1][k] for k in positions]))
        if freed is not None:
            freed.extend(positions[k] for k in lost)
        return results

    return run_plan(plan, range(len(sentences)), work, progress)
