"""The three grammar operations of one split-merge cycle (Petrov, Barrett, Thibaux & Klein 2006,
"Learning Accurate, Compact, and Interpretable Tree Annotation", sections 2.1-2.3):
split every subcategory in two, merge back the splits that matter least, smooth each
subcategory toward its siblings.
"""

from __future__ import annotations

import torch
from torch import Tensor

from treewright.refine.latent import LatentGrammar, normalize
from treewright.refine.trees import TreeEStep, TreeSet


def split(lg: LatentGrammar, perturbation: float, generator: torch.Generator | None = None
          ) -> LatentGrammar:
    """Every subcategory x becomes 2x and 2x+1 (Petrov et al. 2006, section 2.1).

    Each new rule copies its parent rule's probability, divided by two for every child position
    (the two halves of a child together carry what the child carried), so with `perturbation`
    0 every tree keeps exactly its probability. A perturbation multiplies each probability by
    1 + perturbation * u, u uniform on [-1, 1] and drawn from `generator`, then renormalizes:
    this breaks the symmetry that EM could otherwise never leave (Petrov et al. used 1%).
    """
    def grow(t: Tensor, dims: tuple[int, ...]) -> Tensor:
        for d in dims:
            t = t.repeat_interleave(2, dim=d)
        return t

    binary = grow(lg.binary, (1, 2, 3)) / 4
    lexical = grow(lg.lexical, (1,))
    root = grow(lg.root, (1,)) / 2
    grown = lg.with_params(binary, lexical, root, lg.splits * 2)
    if perturbation > 0:
        def jitter(t: Tensor) -> Tensor:
            u = torch.rand(t.shape, generator=generator, dtype=t.dtype) * 2 - 1
            return t * (1 + perturbation * u)
        grown = normalize(grown, jitter(binary), jitter(lexical), jitter(root))
    return grown


def merge_losses(lg: LatentGrammar, ts: TreeSet, estep: TreeEStep) -> Tensor:
    """(S, K/2) estimated loss in training log-likelihood from merging the pair (2j, 2j+1) of
    each symbol back into one subcategory; +inf for pairs that do not exist.

    Petrov et al. 2006, section 2.2: at a node n with symbol A, the tree's likelihood is
    sum_x I_x O_x; with the pair merged it becomes approximately
    sum_{x not in pair} I_x O_x + (p1 I_1 + p2 I_2)(O_1 + O_2), where p1, p2 are the relative
    frequencies of the two subcategories. The loss of a merge is the sum over every node where
    A occurs of -log(merged / unmerged) (each node's estimate is made on its own, as there).
    """
    K = lg.width
    S = len(lg.symbols)
    posterior = estep.inside * estep.outside                               # (N, K)
    usage = torch.zeros(S, K, dtype=posterior.dtype).index_add_(0, ts.symbol, posterior)
    pair_usage = usage.view(S, K // 2, 2)
    pair_total = pair_usage.sum(2, keepdim=True)
    freq = torch.where(pair_total > 0, pair_usage / pair_total.clamp(min=1e-300),
                       torch.full_like(pair_usage, 0.5))                 # (S, K/2, 2)
    inside = estep.inside.view(-1, K // 2, 2)
    outside = estep.outside.view(-1, K // 2, 2)
    f = freq[ts.symbol]                                                    # (N, K/2, 2)
    whole = posterior.sum(1, keepdim=True)                                 # (N, 1)
    pair_post = (inside * outside).sum(2)                                  # (N, K/2)
    merged = whole - pair_post + (f * inside).sum(2) * outside.sum(2)
    ratio = (merged / whole).clamp(min=1e-300)
    exists = lg.valid.view(S, K // 2, 2)[:, :, 1]                          # (S, K/2)
    loss = torch.zeros(S, K // 2, dtype=ratio.dtype).index_add_(0, ts.symbol, -ratio.log())
    return torch.where(exists, loss, torch.full_like(loss, float("inf")))


def merge_plan(lg: LatentGrammar, losses: Tensor, fraction: float) -> Tensor:
    """(S, K/2) bool: the `fraction` of existing pairs with the smallest losses (ties broken by
    symbol then pair order, so the plan is deterministic)."""
    exists = torch.isfinite(losses)
    count = int(round(fraction * int(exists.sum())))
    plan = torch.zeros_like(exists)
    if count > 0:
        order = torch.argsort(losses.flatten(), stable=True)[:count]
        plan.view(-1)[order] = True
    return plan


def merge(lg: LatentGrammar, plan: Tensor, estep: TreeEStep | None = None,
          counts: tuple[Tensor, Tensor, Tensor] | None = None) -> LatentGrammar:
    """Merge the planned pairs (Petrov et al. 2006, section 2.2): as a parent, the merged
    subcategory's rule probabilities are the average of the two weighted by their relative
    frequencies; as a child it stands for both (their probabilities add). The frequencies come
    from the expected counts (binary, lexical, root blocks) of `counts`, by default those of
    `estep`. Subcategories are renumbered 0..n-1 per symbol; K shrinks to the new maximum."""
    if counts is None:
        assert estep is not None
        counts = (estep.binary, estep.lexical, estep.root)
    S, K = len(lg.symbols), lg.width
    splits = lg.splits.tolist()
    target = torch.zeros(S, K, dtype=torch.long)
    new_splits = []
    for s in range(S):
        n = 0
        for j in range(splits[s] // 2):
            target[s, 2 * j] = n
            n += 0 if plan[s, j] else 1
            target[s, 2 * j + 1] = n
            n += 1
        for x in range(2 * (splits[s] // 2), splits[s]):  # an odd leftover (never split)
            target[s, x] = n
            n += 1
        new_splits.append(n)
    new_k = max(new_splits)
    valid = lg.valid.to(lg.binary.dtype)
    proj = torch.zeros(S, K, new_k, dtype=lg.binary.dtype)                  # (S, K, K')
    proj.scatter_(2, target[:, :, None], valid[:, :, None])
    # (S, K, K') parent weights: each subcategory's share of its merged group's uses (equal
    # shares where the group was never used).
    uses = lg.lhs_totals(counts[0], counts[1])[:, :, None] * proj + 1e-300 * proj
    share = uses / uses.sum(1, keepdim=True).clamp(min=1e-300)
    A, B, C = lg.rules.unbind(1)
    X = lg.words[:, 0]
    binary = torch.einsum("rabc,rax,rby,rcz->rxyz", lg.binary, share[A], proj[B], proj[C])
    lexical = torch.einsum("la,lax->lx", lg.lexical, share[X])
    root = torch.einsum("ua,uax->ux", lg.root, proj[lg.tops])
    return lg.with_params(binary, lexical, root, torch.tensor(new_splits))


def smooth(lg: LatentGrammar, nonterminal_weight: float, preterminal_weight: float
           ) -> LatentGrammar:
    """Pull each subcategory's rule distribution toward the mean of its siblings' (Petrov et al.
    2006, section 2.3): p'(A_x -> r) = (1 - a) p(A_x -> r) + a * mean_x' p(A_x' -> r), with a the
    weight of A's kind (a symbol with binary rules counts as a nonterminal). Row sums stay one,
    since a mean of distributions is a distribution."""
    valid = lg.valid.to(lg.binary.dtype)                                   # (S, K)
    has_binary = torch.zeros(len(lg.symbols), dtype=torch.bool)
    has_binary[lg.rules[:, 0]] = True
    weight = torch.where(has_binary, torch.tensor(nonterminal_weight, dtype=valid.dtype),
                         torch.tensor(preterminal_weight, dtype=valid.dtype))   # (S,)
    count = lg.splits.to(valid.dtype)
    A, X = lg.rules[:, 0], lg.words[:, 0]
    mean_b = (lg.binary * valid[A][:, :, None, None]).sum(1, keepdim=True) \
        / count[A][:, None, None, None]
    mean_l = (lg.lexical * valid[X]).sum(1, keepdim=True) / count[X][:, None]
    wa, wx = weight[A][:, None, None, None], weight[X][:, None]
    binary = ((1 - wa) * lg.binary + wa * mean_b) * valid[A][:, :, None, None]
    lexical = ((1 - wx) * lg.lexical + wx * mean_l) * valid[X]
    return lg.with_params(binary, lexical, lg.root)
