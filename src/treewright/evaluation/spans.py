"""Span sets: one sentence's constituents as word intervals, and the reference trees built from them.

A span is a half-open word interval `(start, end)`, 0-based, as in `treewright.trees`. The builders
here (`left_branching`, `right_branching`, `random_binary`, `binary_upper_bound`) return every
constituent of width two or more of a binary tree over `n` words, the whole-sentence span `(0, n)`
included; the scorer in `brackets.py` decides which of them count.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass
from typing import Collection, Iterable, Sequence

from treewright.trees import Tree, tree_from_spans

Span = tuple[int, int]
LabeledSpan = tuple[int, int, "str | None"]


@dataclass(frozen=True)
class Bracketing:
    """One sentence: its words, its labeled spans and (optionally) its part-of-speech tags.

    words: the n tokens, shape (n,).
    spans: distinct `(start, end, label)` with 0 <= start < end <= n; label is None for an
        unlabeled span. Width-one spans (preterminals) may be present; they never count in scoring.
    tags: one tag per word, shape (n,), or None when the sentence has none. Punctuation removal
        uses the gold sentence's tags when it has them.
    """

    words: tuple[str, ...]
    spans: frozenset[LabeledSpan]
    tags: tuple[str, ...] | None = None

    @classmethod
    def from_tree(cls, tree: Tree) -> "Bracketing":
        """Every constituent of `tree`; tags are the preterminal labels when every word has one."""
        words = tuple(tree.leaves())
        tags = tuple(node.label for node in tree.subtrees() if node.is_preterminal())
        return cls(words, frozenset(tree.labeled_spans()), tags if len(tags) == len(words) else None)

    @classmethod
    def from_spans(cls, words: Sequence[str], spans: Iterable[Sequence], tags: Sequence[str] | None = None
                   ) -> "Bracketing":
        """From `(start, end)` pairs (unlabeled) or `(start, end, label)` triples, in any order."""
        labeled = frozenset((int(s[0]), int(s[1]), s[2] if len(s) > 2 else None) for s in spans)
        return cls(tuple(words), labeled, None if tags is None else tuple(tags))

    def unlabeled(self) -> frozenset[Span]:
        """The distinct `(start, end)` intervals: a unary chain over one interval counts once."""
        return frozenset((s, e) for s, e, _ in self.spans)

    def remove_words(self, drop: Collection[int]) -> "Bracketing":
        """This sentence without the words at positions `drop`, every span recomputed over the rest.

        A span keeps the remaining words it covered; one left with no words disappears, and spans
        that now cover the same words merge (as a set).
        """
        if not drop:
            return self
        drop = set(drop)
        # kept_before[i] = number of kept words left of position i, shape (n + 1,): a span (s, e)
        # over the old positions covers exactly the kept words kept_before[s] .. kept_before[e] - 1.
        kept_before = [0]
        for i in range(len(self.words)):
            kept_before.append(kept_before[-1] + (i not in drop))
        spans = frozenset((kept_before[s], kept_before[e], label) for s, e, label in self.spans
                          if kept_before[e] > kept_before[s])
        keep = [i for i in range(len(self.words)) if i not in drop]
        tags = None if self.tags is None else tuple(self.tags[i] for i in keep)
        return Bracketing(tuple(self.words[i] for i in keep), spans, tags)


def left_branching(n: int) -> frozenset[Span]:
    """Spans of the left-branching binary tree ((w1 w2) w3) ...: (0, j) for j = 2..n."""
    return frozenset((0, end) for end in range(2, n + 1))


def right_branching(n: int) -> frozenset[Span]:
    """Spans of the right-branching binary tree w1 (w2 (w3 ...)): (i, n) for i = 0..n-2."""
    return frozenset((start, n) for start in range(0, n - 1))


def _bracketings(m: int) -> int:
    """Number of binary trees over m >= 1 words: the Catalan number C(m - 1)."""
    return math.comb(2 * (m - 1), m - 1) // m


def random_binary(n: int, rng: random.Random) -> frozenset[Span]:
    """Spans of a binary tree over n words drawn uniformly from all C(n - 1) binary bracketings.

    Top-down: a span of m words splits after k words with probability
    count(k) * count(m - k) / count(m), which makes every full tree equally likely (each tree's
    probability is the product of these ratios, which telescopes to 1 / count(n)). Exact integer
    arithmetic, so long sentences carry no rounding bias.
    """
    spans: set[Span] = set()
    stack = [(0, n)] if n >= 2 else []
    while stack:
        start, end = stack.pop()
        spans.add((start, end))
        m = end - start
        draw = rng.randrange(_bracketings(m))
        for k in range(1, m):
            weight = _bracketings(k) * _bracketings(m - k)
            if draw < weight:
                break
            draw -= weight
        for part in ((start, start + k), (start + k, end)):
            if part[1] - part[0] >= 2:
                stack.append(part)
    return frozenset(spans)


def binary_upper_bound(n: int, gold: Iterable[Span]) -> frozenset[Span]:
    """Spans of a binary tree over n words that contains every gold span of width two or more.

    No binary tree scores higher against `gold`: it has recall 1 and, like every binary tree, n - 1
    spans, so its precision is the most any binary tree reaches. Gold nodes with more than two
    children are binarized right-branching over their children; the spans this adds are the ones
    no flatter gold tree can match. Raises ValueError when two gold spans cross (then no tree
    contains them all).
    """
    if n < 2:
        return frozenset()
    nested = sorted({(s, e) for s, e in gold if e - s >= 2} | {(0, n)}, key=lambda sp: (sp[0], -sp[1]))
    children: dict[Span, list[Span]] = {sp: [] for sp in nested}
    open_spans = [nested[0]]  # the chain of ancestors of the span being placed
    for span in nested[1:]:
        while open_spans[-1][1] <= span[0]:
            open_spans.pop()
        parent = open_spans[-1]
        if span[1] > parent[1]:
            raise ValueError(f"gold spans {parent} and {span} cross")
        children[parent].append(span)
        open_spans.append(span)
    out = set(nested)
    for (start, end), kids in children.items():
        # The starts of this node's parts in order: child constituents and loose words.
        part_starts: list[int] = []
        pos = start
        for kid_start, kid_end in kids:
            part_starts.extend(range(pos, kid_start))
            part_starts.append(kid_start)
            pos = kid_end
        part_starts.extend(range(pos, end))
        out.update((part_start, end) for part_start in part_starts[1:-1])
    assert len(out) == n - 1, "a binary tree over n words has n - 1 spans of width >= 2"
    return frozenset(out)


def spans_to_tree(words: Sequence[str], spans: Iterable[Span], phrase_label: str = "X",
                  word_label: str | None = None) -> Tree:
    """A `Tree` with a `phrase_label` node for each span of width >= 2 (and for the whole sentence).

    With `word_label`, every word sits under a preterminal of that label; otherwise words hang
    directly under their smallest span. Raises ValueError when spans cross.
    """
    n = len(words)
    labeled = [(s, e, phrase_label) for s, e in spans if e - s >= 2] + [(0, n, phrase_label)]
    tree = tree_from_spans(list(words), labeled)
    if word_label is not None:
        for node in list(tree.subtrees()):  # listed first: the new preterminals must not be revisited
            node.children = [Tree(word_label, [c]) if isinstance(c, str) else c for c in node.children]
    return tree


def left_branching_tree(words: Sequence[str], phrase_label: str = "X", word_label: str | None = None) -> Tree:
    """The left-branching binary `Tree` over `words` (see `spans_to_tree` for the labels)."""
    return spans_to_tree(words, left_branching(len(words)), phrase_label, word_label)


def right_branching_tree(words: Sequence[str], phrase_label: str = "X", word_label: str | None = None) -> Tree:
    """The right-branching binary `Tree` over `words` (see `spans_to_tree` for the labels)."""
    return spans_to_tree(words, right_branching(len(words)), phrase_label, word_label)
