"""Inside-outside over latent subcategories on observed trees, batched by node height.

The trees fix the coarse symbols; only the subcategory at each node is hidden (Matsuzaki et al.
2005; Petrov et al. 2006). All nodes of all trees are laid out in flat arrays once. The inside
pass then walks the heights bottom-up and handles every node of one height in one batched
product, gathering the child vectors by index; the outside pass walks the heights top-down.

Scaling: each node's inside vector is divided by its largest entry `peak` and the logs are kept
(`log_scale` = log peaks summed over the subtree), so deep trees never underflow. The outside
vectors are kept *posterior-normalized*: inside[n] * outside[n] summed over subcategories is
one at every node (see `TreeEStep`), which makes the merge estimate a formula in these two
vectors alone.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Sequence

import torch
from torch import Tensor

from treewright.corpus.transforms import BIN_MARK, PARENT_SEP, UNARY_SEP
from treewright.grammar import SUBCATEGORY_MARK, split_name
from treewright.refine.latent import LatentGrammar
from treewright.trees import Tree

# Nodes per batched product: bounds the gathered (n, K, K, K) rule blocks to about 32 MiB.
_BLOCK_ENTRIES = 2 ** 22


@dataclass
class TreeSet:
    """Trees as flat node arrays indexed against one `LatentGrammar`'s coarse inventory.

    Node arrays have one entry per node of the kept trees (N nodes):
    `symbol` (N,), `rule` (N,) binary rule id or -1, `word_rule` (N,) lexical rule id or -1,
    `left`/`right` (N,) child node ids or -1. `levels[0]` holds the word nodes, `levels[h]` the
    binary nodes of height h. `top_node`/`top_rule` (T,) give each kept tree's top node and its
    root rule. Trees the grammar cannot build (a coarse rule or word it has never seen) are
    listed in `dropped` with the reason, never silently lost.
    """
    symbol: Tensor
    rule: Tensor
    word_rule: Tensor
    left: Tensor
    right: Tensor
    levels: list[Tensor]
    top_node: Tensor
    top_rule: Tensor
    kept: list[int]
    words: int
    dropped: list[tuple[int, str]] = field(default_factory=list)

    @property
    def num_trees(self) -> int:
        return len(self.kept)


_TRANSFORM_MARKS = "[" + re.escape(BIN_MARK + PARENT_SEP + UNARY_SEP) + "]"


def cnf_problem(tree: Tree, start: str = "ROOT") -> str | None:
    """None if every node of `tree` is a preterminal (one word below) or binary over two
    phrases, the form `tree_set` and the coarse estimate take, and no label is the name of the
    coarse grammar's start symbol `start`; else what the first other node is. `cnf_tree` (in
    `refine.run`) gives that form to any tree whose nodes hold either words alone or phrases
    alone; a node that mixes words and phrases is what remains. Nor may a corpus label end in
    the subcategory mark and a number (`NP·2`): refinement names its own subcategories so."""
    for node in tree.subtrees():
        if node.label == start:
            return (f"the label {start} is the name of the refined grammar's start symbol; "
                    "rename it in the treebank")
        # The corpus labels inside a binarized, annotated or joined label (`_TRANSFORM_MARKS`).
        for label in re.split(_TRANSFORM_MARKS, node.label):
            if split_name(label)[1] is not None:
                return (f"the label {label} ends in the subcategory mark {SUBCATEGORY_MARK} and "
                        "a number, which would read as a subcategory of the refined grammar; "
                        "rename it in the treebank")
        if node.is_preterminal():
            continue
        if len(node.children) != 2 or not all(isinstance(c, Tree) for c in node.children):
            kinds = [repr(c) if isinstance(c, str) else c.label for c in node.children]
            return (f"node {node.label} has the children {' '.join(kinds)}; refinement needs "
                    "each word under a tag of its own")
    return None


def tree_set(lg: LatentGrammar, trees: Sequence[Tree]) -> TreeSet:
    """Lay out `trees` (binary CNF trees over the coarse symbols, words already mapped into the
    vocabulary) as node arrays. A Python walk over the nodes happens here once; the passes
    themselves are batched."""
    sym_index = {s: i for i, s in enumerate(lg.symbols)}
    rule_index = {tuple(r): i for i, r in enumerate(lg.rules.tolist())}
    word_index = {tuple(r): i for i, r in enumerate(lg.words.tolist())}
    top_index = {t: i for i, t in enumerate(lg.tops.tolist())}
    vocab = lg.vocab.index
    symbol, rule, word_rule, left, right, height = [], [], [], [], [], []
    top_node, top_rule, kept, dropped = [], [], [], []
    words = 0
    for number, tree in enumerate(trees):
        mark = len(symbol)
        problem = None
        ids: dict[int, int] = {}
        stack: list[tuple[Tree, bool]] = [(tree, False)]
        while stack and problem is None:  # post-order: children get ids before parents
            node, done = stack.pop()
            if not done:
                stack.append((node, True))
                stack.extend((c, False) for c in reversed(node.children) if isinstance(c, Tree))
                continue
            a = sym_index.get(node.label)
            if a is None:
                problem = f"unknown symbol {node.label}"
                break
            if node.is_preterminal():
                w = vocab.get(node.children[0], lg.vocab.unk_id)
                lex = word_index.get((a, w)) if w is not None else None
                if lex is None:
                    problem = f"no rule {node.label} -> {node.children[0]!r}"
                    break
                r, lc, rc, h = -1, -1, -1, 0
            elif len(node.children) == 2 and all(isinstance(c, Tree) for c in node.children):
                lnode, rnode = node.children
                key = (a, sym_index.get(lnode.label, -1), sym_index.get(rnode.label, -1))
                r = rule_index.get(key, -1)
                if r < 0:
                    problem = f"no rule {node.label} -> {lnode.label} {rnode.label}"
                    break
                lc, rc, lex = ids[id(lnode)], ids[id(rnode)], -1
                h = 1 + max(height[lc], height[rc])
            else:
                problem = f"node {node.label} is neither binary nor over one word"
                break
            ids[id(node)] = len(symbol)
            symbol.append(a)
            rule.append(r)
            word_rule.append(lex)
            left.append(lc)
            right.append(rc)
            height.append(h)
        top = sym_index.get(tree.label)
        if problem is None and top not in top_index:
            problem = f"{tree.label} is never the top of a training tree"
        if problem is not None:
            for arr in (symbol, rule, word_rule, left, right, height):
                del arr[mark:]
            dropped.append((number, problem))
            continue
        top_node.append(ids[id(tree)])
        top_rule.append(top_index[top])
        kept.append(number)
        words += len(tree.leaves())
    heights = torch.tensor(height, dtype=torch.long)
    max_h = int(heights.max()) if len(height) else -1
    levels = [torch.nonzero(heights == h).flatten() for h in range(max_h + 1)]
    as_long = lambda xs: torch.tensor(xs, dtype=torch.long)  # noqa: E731
    return TreeSet(as_long(symbol), as_long(rule), as_long(word_rule), as_long(left),
                   as_long(right), levels, as_long(top_node), as_long(top_rule), kept, words,
                   dropped)


@dataclass
class TreeEStep:
    """Expected counts over a `TreeSet` and the per-node scores the merge step needs.

    `loglik` (T,) log p(tree) summed over all subcategory assignments. `binary`, `lexical`,
    `root`: expected rule counts shaped like the grammar's blocks. `inside`, `outside` (N, K):
    scaled so that inside[n] * outside[n] is p(subcategory | tree) at node n.
    """
    loglik: Tensor
    binary: Tensor
    lexical: Tensor
    root: Tensor
    inside: Tensor
    outside: Tensor


def _blocks(index: Tensor, width: int) -> list[Tensor]:
    size = max(1, _BLOCK_ENTRIES // width ** 3)
    return list(index.split(size))


def tree_inside(lg: LatentGrammar, ts: TreeSet) -> tuple[Tensor, Tensor, Tensor]:
    """Bottom-up pass: (inside (N, K) scaled, peak (N,), log_scale (N,))."""
    K = lg.width
    dtype = lg.binary.dtype
    n_nodes = len(ts.symbol)
    inside = torch.zeros(n_nodes, K, dtype=dtype)
    peak = torch.ones(n_nodes, dtype=dtype)
    log_scale = torch.zeros(n_nodes, dtype=dtype)
    for h, level in enumerate(ts.levels):
        for idx in _blocks(level, K):
            if h == 0:
                raw = lg.lexical[ts.word_rule[idx]]                          # (n, K)
                below = torch.zeros(len(idx), dtype=dtype)
            else:
                lc, rc = ts.left[idx], ts.right[idx]
                pairs = (inside[lc][:, :, None] * inside[rc][:, None, :]).reshape(-1, K * K, 1)
                rules = lg.binary[ts.rule[idx]].reshape(-1, K, K * K)        # (n, K, K*K)
                raw = torch.bmm(rules, pairs).squeeze(2)                     # (n, K)
                below = log_scale[lc] + log_scale[rc]
            top = raw.amax(1)
            safe = torch.where(top > 0, top, torch.ones_like(top))
            inside[idx] = raw / safe[:, None]
            peak[idx] = safe
            log_scale[idx] = below + top.log()
    return inside, peak, log_scale


def tree_loglik(lg: LatentGrammar, ts: TreeSet) -> Tensor:
    """(T,) log p(tree), summed over every assignment of subcategories."""
    inside, _, log_scale = tree_inside(lg, ts)
    return _top_loglik(lg, ts, inside, log_scale)


def _top_loglik(lg, ts, inside, log_scale) -> Tensor:
    top = (lg.root[ts.top_rule] * inside[ts.top_node]).sum(1)               # (T,)
    return top.log() + log_scale[ts.top_node]


def tree_estep(lg: LatentGrammar, ts: TreeSet) -> TreeEStep:
    """Inside, then outside, then expected counts, all batched by height."""
    K = lg.width
    inside, peak, log_scale = tree_inside(lg, ts)
    loglik = _top_loglik(lg, ts, inside, log_scale)
    outside = torch.zeros_like(inside)
    # At the top: outside = root weight / p(tree) in the scaled units of the top node.
    top_weights = lg.root[ts.top_rule]                                       # (T, K)
    norm = (top_weights * inside[ts.top_node]).sum(1, keepdim=True)
    outside[ts.top_node] = top_weights / norm
    root_counts = torch.zeros_like(lg.root)
    root_counts.index_add_(0, ts.top_rule, outside[ts.top_node] * inside[ts.top_node])
    binary_counts = torch.zeros_like(lg.binary)
    for level in reversed(ts.levels[1:]):
        for idx in _blocks(level, K):
            lc, rc = ts.left[idx], ts.right[idx]
            out = outside[idx] / peak[idx][:, None]                          # (n, K)
            rules = lg.binary[ts.rule[idx]]                                  # (n, K, K, K)
            il, ir = inside[lc], inside[rc]
            weighted = rules * out[:, :, None, None]                        # (n, K, K, K)
            # Each node is the child of exactly one parent, so children are assigned, not added.
            outside[lc] = torch.einsum("nabc,nc->nb", weighted, ir)
            outside[rc] = torch.einsum("nabc,nb->nc", weighted, il)
            counts = weighted * il[:, None, :, None] * ir[:, None, None, :]
            binary_counts.index_add_(0, ts.rule[idx], counts)
    lexical_counts = torch.zeros_like(lg.lexical)
    if ts.levels:
        leaves = ts.levels[0]
        lexical_counts.index_add_(0, ts.word_rule[leaves], inside[leaves] * outside[leaves])
    return TreeEStep(loglik, binary_counts, lexical_counts, root_counts, inside, outside)
