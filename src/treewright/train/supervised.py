"""Supervised maximum likelihood from trees: the relative frequency of each rule,
p(A -> beta) = count(A -> beta) / count(A) (a fact of the trade; it is the maximum-likelihood
estimate of a PCFG from fully observed trees).

The trees must already be in the grammar's normal form: every node has two phrase children or is
a preterminal over one word (binarize and collapse unary chains first with `corpus.transforms`).
The top label of each tree becomes a rule `start -> label`, which gives the root distribution.
"""

from __future__ import annotations

from collections import Counter
from typing import Sequence

from treewright.errors import InputError
from treewright.grammar import Grammar, build_grammar
from treewright.trees import Tree
from treewright.vocab import Vocabulary


def estimate_from_trees(trees: Sequence[Tree], start: str = "ROOT", unk: str | None = None,
                        source: str | None = None) -> Grammar:
    """The relative-frequency grammar of `trees` (float64).

    Symbols are ordered by first appearance (pre-order); a label with binary rules is a
    nonterminal (it may also have word rules: general CNF), one with word rules only is a
    preterminal. `unk`, when given, is added to the vocabulary with probability zero under
    every symbol (callers that want it to have mass replace rare words with it first).
    Raises InputError, naming the tree (1-based, as `line`) and node, for a node that is neither
    binary over phrases nor a preterminal, for a tree whose top is a preterminal (a one-word
    tree has no place in the root distribution over nonterminals), or when a label equals
    `start`.
    """
    if not trees:
        raise InputError("no trees to estimate from", path=source)
    top: Counter = Counter()
    binary: Counter = Counter()
    lexical: Counter = Counter()
    order: dict[str, None] = {}
    words: dict[str, None] = {}
    for number, tree in enumerate(trees, start=1):
        if tree.is_preterminal():
            raise InputError(f"the tree's top {tree.label} is a preterminal over one word; "
                             "give one-word sentences a phrase node or leave them out",
                             path=source, line=number)
        top[tree.label] += 1
        for node in tree.subtrees():
            if node.label == start:
                raise InputError(f"the label {start} is the start symbol's name; choose another "
                                 "start", path=source, line=number)
            order.setdefault(node.label)
            if node.is_preterminal():
                lexical[(node.label, node.children[0])] += 1
                words.setdefault(node.children[0])
            elif len(node.children) == 2 and all(isinstance(c, Tree) for c in node.children):
                left, right = node.children
                binary[(node.label, left.label, right.label)] += 1
            else:
                raise InputError(f"node {node.label} has {len(node.children)} children; "
                                 "binarize the trees and collapse unary chains first",
                                 path=source, line=number)
    with_binary = {a for a, _, _ in binary}
    nonterminals = [s for s in order if s in with_binary]
    preterminals = [s for s in order if s not in with_binary]
    if unk is not None:
        words.setdefault(unk)
    # count(A) is the number of nodes labelled A, its binary and word rules together: the
    # builder divides every left-hand side by that total (with tolerance 0 only a total of
    # exactly one is left as it is, which dividing by it would not change).
    return build_grammar(nonterminals, preterminals, Vocabulary(list(words), unk=unk), start,
                         {a: float(n) for a, n in top.items()},
                         {rule: float(n) for rule, n in binary.items()},
                         {rule: float(n) for rule, n in lexical.items()},
                         rescale=True, tolerance=0.0)
