"""Constituency trees: the one tree type shared by corpora, decoders, evaluation and export.

A `Tree` has a label and a list of children; a child is either a `Tree` or a word (`str`).
Spans are half-open word intervals `(i, j)`, 0-based, as in the inside chart.
"""

from __future__ import annotations

import re

from dataclasses import dataclass, field
from typing import Iterator, Union

Child = Union["Tree", str]


@dataclass
class Tree:
    label: str
    children: list[Child] = field(default_factory=list)

    def leaves(self) -> list[str]:
        out: list[str] = []
        stack: list[Child] = [self]
        while stack:  # iterative: trees from strangers may nest thousands deep
            node = stack.pop()
            if isinstance(node, str):
                out.append(node)
            else:
                stack.extend(reversed(node.children))
        return out

    def word_slots(self) -> list[tuple["Tree", int, str]]:
        """(owning node, child index, word) for every word, left to right: where each word sits,
        for code that must find a word's node again (heads, drawing)."""
        out: list[tuple[Tree, int, str]] = []
        stack: list[tuple[Tree, int]] = [(self, 0)]
        while stack:  # iterative, as in `leaves`
            node, k = stack.pop()
            if k == len(node.children):
                continue
            stack.append((node, k + 1))
            child = node.children[k]
            if isinstance(child, str):
                out.append((node, k, child))
            else:
                stack.append((child, 0))
        return out

    def __len__(self) -> int:
        return len(self.leaves())

    def is_preterminal(self) -> bool:
        return len(self.children) == 1 and isinstance(self.children[0], str)

    def labeled_spans(self) -> list[tuple[int, int, str]]:
        """Every constituent as (start, end, label), preterminals included, in pre-order."""
        out: list[tuple[int, int, str]] = []
        # Iterative walk (deep trees from strangers must not hit the recursion limit): each
        # frame is (node, index of its entry in `out`, next child, position).
        stack: list[list] = [[self, 0, 0, 0]]
        out.append((0, 0, self.label))
        while stack:
            frame = stack[-1]
            node, entry, k, pos = frame
            if k == len(node.children):
                start = out[entry][0]
                out[entry] = (start, pos, node.label)
                stack.pop()
                if stack:
                    stack[-1][3] = pos
                continue
            frame[2] = k + 1
            child = node.children[k]
            if isinstance(child, str):
                frame[3] = pos + 1
            else:
                out.append((pos, pos, child.label))
                stack.append([child, len(out) - 1, 0, pos])
        return out

    def subtrees(self) -> Iterator["Tree"]:
        stack: list[Tree] = [self]
        while stack:
            node = stack.pop()
            yield node
            stack.extend(c for c in reversed(node.children) if isinstance(c, Tree))

    def with_leaves(self, words: list[str]) -> "Tree":
        """A copy whose leaves, left to right, are `words` (as many as the tree has)."""
        words = list(words)
        if len(words) != len(self):
            raise ValueError(f"{len(words)} words for a tree of {len(self)} leaves")
        it = iter(words)
        root = Tree(self.label, [None] * len(self.children))
        # Pre-order with an explicit stack (children pushed in reverse), so leaves come off it
        # left to right; iterative, for the same reason as labeled_spans.
        stack: list = [(child, root, k) for k, child in reversed(list(enumerate(self.children)))]
        while stack:
            node, parent, k = stack.pop()
            if isinstance(node, str):
                parent.children[k] = next(it)
                continue
            copy = Tree(node.label, [None] * len(node.children))
            parent.children[k] = copy
            stack.extend((child, copy, j) for j, child in reversed(list(enumerate(node.children))))
        return root

    def to_string(self) -> str:
        """The bracketed notation, on one line: (S (NP (D the) (N ferry)) (V left))."""
        parts: list[str] = []
        stack: list = [self]
        while stack:  # iterative, for the same reason as labeled_spans
            node = stack.pop()
            if node is _CLOSE:
                parts.append(")")
            elif isinstance(node, str):
                parts.append(" " + escape_token(node))
            else:
                parts.append((" (" if parts else "(") + escape_token(node.label))
                stack.append(_CLOSE)
                stack.extend(reversed(node.children))
        return "".join(parts)

    def __str__(self) -> str:
        return self.to_string()


_CLOSE = object()  # marks the end of a node in the iterative writer

_ESCAPES = {"(": "-LRB-", ")": "-RRB-"}


_SPACES = re.compile(r"\s+")


def escape_token(token: str) -> str:
    """Brackets inside words or labels are written as the trade's -LRB-/-RRB- (common practice),
    and white space inside one (a CoNLL-U word may hold a space) as `_`, so that the token stays
    one leaf of a bracketed tree; evaluation compares words in this form."""
    for raw, esc in _ESCAPES.items():
        token = token.replace(raw, esc)
    return _SPACES.sub("_", token)


def tree_from_spans(words: list[str], spans: list[tuple[int, int, str]]) -> Tree:
    """Build a tree from nested labeled spans given in any order.

    Spans of width one become preterminals over their word; words not covered by a width-one
    span hang directly under their smallest enclosing span. Raises ValueError if two spans cross
    or if the whole-sentence span (0, n) is missing.
    """
    n = len(words)
    ordered = sorted(set(spans), key=lambda s: (s[0], -(s[1] - s[0])))
    if not ordered or ordered[0][:2] != (0, n):
        raise ValueError("spans must include the whole sentence (0, n)")
    root = Tree(ordered[0][2])
    # Pre-order walk with an explicit stack of open constituents: (end, node, next word to place).
    stack: list[list] = [[n, root, 0]]

    def close_top() -> None:
        end, node, pos = stack.pop()
        node.children.extend(words[pos:end])
        stack[-1][2] = end

    for start, end, label in ordered[1:]:
        while stack[-1][0] <= start:
            close_top()
        parent_end, parent, pos = stack[-1]
        if end > parent_end or start < pos:
            raise ValueError(f"span ({start}, {end}) crosses another span")
        parent.children.extend(words[pos:start])
        node = Tree(label)
        parent.children.append(node)
        stack.append([end, node, start])
    while len(stack) > 1:
        close_top()
    stack[0][1].children.extend(words[stack[0][2]:n])
    return root
