"""Induced preterminals against gold part-of-speech tags: many-to-one accuracy and V-measure.

Both compare two labelings of the same tokens through their contingency table
`counts[k, c]` = number of tokens with induced label k and gold tag c, shape (K, C).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Hashable, Sequence

import numpy as np

from treewright.errors import InputError
from treewright.trees import Tree, escape_token


@dataclass(frozen=True)
class TagScores:
    """Scores of an induced labeling against gold tags over `tokens` tokens (all in [0, 1])."""

    many_to_one: float
    homogeneity: float
    completeness: float
    v_measure: float
    beta: float
    tokens: int
    induced_labels: int
    gold_labels: int

    def to_dict(self) -> dict:
        out = asdict(self)
        out["conventions"] = {
            "many_to_one": "each induced label is mapped to the gold tag it most often meets; accuracy of that map",
            "v_measure": "Rosenberg & Hirschberg (2007); (1 + beta) * h * c / (beta * h + c)",
            "degenerate": "homogeneity is 1 when gold has one tag, completeness is 1 when one label is induced",
        }
        return out


def preterminal_labels(tree: Tree) -> list[str]:
    """The preterminal label above each word, left to right; raises ValueError if a word has none."""
    labels = [node.label for node in tree.subtrees() if node.is_preterminal()]
    if len(labels) != len(tree.leaves()):
        raise ValueError("not every word of the tree sits under a preterminal")
    return labels


def words_over_tags(pred: Sequence[Tree], words: Sequence[Sequence[str]],
                    tags: Sequence[Sequence[str] | None]) -> tuple[list[Tree], int]:
    """Predicted trees with the gold words put back where a grammar trained on tags parsed the
    tags themselves: a tree whose leaves are exactly the gold sentence's tags gets the gold
    words as leaves (its brackets and labels unchanged). Other trees are returned as they are.
    Returns the trees and how many were over tags. `words`, `tags`: the gold sentences' (trees
    beyond the last gold sentence are returned as they are). Tokens compare in their
    bracketed-file form (`escape_token`), as the bracket evaluation compares words."""
    out, over = list(pred), 0
    for k, (tree, w, t) in enumerate(zip(pred, words, tags)):
        leaves = [escape_token(x) for x in tree.leaves()]
        if t is not None and leaves == [escape_token(x) for x in t] \
                and leaves != [escape_token(x) for x in w]:
            out[k] = tree.with_leaves(list(w))
            over += 1
    return out, over


def evaluate_tags(induced: Sequence[Sequence[Hashable]], gold: Sequence[Sequence[Hashable]], *,
                  beta: float = 1.0, induced_path: str | None = None, gold_path: str | None = None
                  ) -> TagScores:
    """Many-to-one accuracy, homogeneity, completeness and V-measure of induced tags.

    induced, gold: per sentence, one label per token (induced labels may be any hashable, e.g.
        `preterminal_labels(tree)`). Raises InputError naming the first sentence (1-based) whose
        lengths differ, or when the sentence counts differ or there is no token at all.
    beta: weight of completeness against homogeneity in the V-measure (1 = the harmonic mean).
    """
    path = induced_path if induced_path is not None else gold_path
    if len(induced) != len(gold):
        first = min(len(induced), len(gold)) + 1
        raise InputError(f"sentence {first}: {len(induced)} induced tag sequences, {len(gold)} gold ones",
                         path=path, line=first)
    flat_induced: list[Hashable] = []
    flat_gold: list[Hashable] = []
    for index, (ind, g) in enumerate(zip(induced, gold)):
        if len(ind) != len(g):
            raise InputError(f"sentence {index + 1}: {len(ind)} induced tags for {len(g)} gold tags",
                             path=path, line=index + 1)
        flat_induced.extend(ind)
        flat_gold.extend(g)
    if not flat_gold:
        raise InputError("no tokens to score tags on", path=path)
    counts = contingency(flat_induced, flat_gold)
    h, c, v = homogeneity_completeness_v(counts, beta)
    return TagScores(many_to_one=many_to_one(counts), homogeneity=h, completeness=c, v_measure=v, beta=beta,
                     tokens=len(flat_gold), induced_labels=counts.shape[0], gold_labels=counts.shape[1])


def contingency(induced: Sequence[Hashable], gold: Sequence[Hashable]) -> np.ndarray:
    """counts[k, c] = tokens with induced label k and gold tag c, shape (K, C), labels in first-seen order."""
    induced_ids = {lab: i for i, lab in enumerate(dict.fromkeys(induced))}
    gold_ids = {lab: i for i, lab in enumerate(dict.fromkeys(gold))}
    counts = np.zeros((len(induced_ids), len(gold_ids)), dtype=np.int64)
    np.add.at(counts, ([induced_ids[x] for x in induced], [gold_ids[x] for x in gold]), 1)
    return counts


def many_to_one(counts: np.ndarray) -> float:
    """Accuracy when each induced label (row) takes its most frequent gold tag (column)."""
    return float(counts.max(axis=1).sum() / counts.sum())


def _entropy(marginal: np.ndarray) -> float:
    p = marginal[marginal > 0] / marginal.sum()
    return float(-(p * np.log(p)).sum())


def homogeneity_completeness_v(counts: np.ndarray, beta: float = 1.0) -> tuple[float, float, float]:
    """Homogeneity, completeness and V-measure of a (K, C) contingency table.

    Rosenberg & Hirschberg (2007), "V-Measure: A conditional entropy-based external cluster
    evaluation measure": h = 1 - H(C|K) / H(C), c = 1 - H(K|C) / H(K), with h = 1 when H(C) = 0
    and c = 1 when H(K) = 0. Natural logarithms (the ratios do not depend on the base).
    """
    total = counts.sum()
    joint = counts[counts > 0] / total
    # H(C, K); then H(C|K) = H(C, K) - H(K) and H(K|C) = H(C, K) - H(C).
    joint_entropy = float(-(joint * np.log(joint)).sum())
    h_gold = _entropy(counts.sum(axis=0))
    h_induced = _entropy(counts.sum(axis=1))
    homogeneity = 1.0 if h_gold == 0 else 1.0 - (joint_entropy - h_induced) / h_gold
    completeness = 1.0 if h_induced == 0 else 1.0 - (joint_entropy - h_gold) / h_induced
    if homogeneity + completeness == 0:
        return homogeneity, completeness, 0.0
    v = (1 + beta) * homogeneity * completeness / (beta * homogeneity + completeness)
    return homogeneity, completeness, v
