"""Tree transforms with exact inverses: binarization (with markovization) and unary collapsing.

    unbinarize(binarize(t, ...)) == t        expand_unary(collapse_unary(t, ...)) == t

Reserved characters (chosen because no treebank tag set uses them; a label that already holds one
makes the transform raise ValueError instead of producing a tree it could not undo):

- `UNARY_SEP` "¦" (U+00A6, broken bar) joins a collapsed unary chain: (S (VP ...)) -> (S¦VP ...).
- `PARENT_SEP` "ˆ" (U+02C6, modifier circumflex) adds ancestors for vertical markovization
  (parent annotation, Johnson 1998, "PCFG Models of Linguistic Tree Representations"):
  NP under S becomes NPˆS at v=2, NPˆSˆROOT at v=3.
- `BIN_MARK` "¤" (U+00A4, currency sign) starts every intermediate node made by binarization,
  followed by the (annotated) parent label and its horizontal context: "¤NP¤DT¤JJ". Undoing
  only needs the mark; the context is there to split (or merge) grammar symbols.

All transforms are iterative, so trees thousands of levels deep are fine.
"""

from __future__ import annotations

from typing import Callable, Iterable, Literal

from treewright.trees import Child, Tree
from treewright.corpus.walk import rebuild

UNARY_SEP = "\u00a6"
PARENT_SEP = "\u02c6"
BIN_MARK = "\u00a4"


def _check_labels(tree: Tree, reserved: str, action: str) -> None:
    for node in tree.subtrees():
        if any(ch in node.label for ch in reserved):
            raise ValueError(f"cannot {action}: label {node.label!r} already contains a reserved "
                             f"character ({', '.join(repr(c) for c in reserved)})")


def _child_label(child: Child) -> str:
    # A word child adds an empty entry to the context: words are not grammar symbols.
    return "" if isinstance(child, str) else child.label


def binarize(tree: Tree, factor: Literal["right", "left"] = "right",
             horizontal: int | None = None, vertical: int = 1) -> Tree:
    """A binary-branching copy of `tree` (nodes with more than two children are factored).

    factor: "right" nests new nodes to the right, X -> c0 (¤X c1 ... ck); "left" to the left,
        X -> (¤X c0 ... ck-1) ck.
    horizontal: the horizontal markovization order h, the number of the original children's
        labels an intermediate node remembers (the first h it covers when right-factored, the
        last h when left-factored); None (default) remembers all of them, 0 none.
    vertical: the vertical order v; every phrase below the root (preterminals excluded) is
        annotated with its v-1 nearest ancestors' labels. 1 (default) adds nothing.
    """
    if factor not in ("right", "left"):
        raise ValueError(f"factor must be 'right' or 'left', got {factor!r}")
    if horizontal is not None and horizontal < 0:
        raise ValueError(f"horizontal must be >= 0 or None, got {horizontal}")
    if vertical < 1:
        raise ValueError(f"vertical must be >= 1, got {vertical}")
    _check_labels(tree, PARENT_SEP + BIN_MARK, "binarize")

    annotated: dict[int, str] = {}
    stack: list[tuple[Tree, tuple[str, ...]]] = [(tree, ())]
    while stack:  # top-down: each node learns its ancestors' original labels
        node, ancestors = stack.pop()
        label = node.label
        if ancestors and not node.is_preterminal():
            label = PARENT_SEP.join((label,) + ancestors[:vertical - 1])
        annotated[id(node)] = label
        below = (node.label,) + ancestors
        stack.extend((c, below) for c in node.children if isinstance(c, Tree))

    def context(base: str, labels: list[str]) -> str:
        if horizontal is not None:
            labels = labels[:horizontal] if factor == "right" else labels[len(labels) - horizontal:]
        return BIN_MARK.join([BIN_MARK + base] + labels)

    def visit(node: Tree, kids: list[Child]) -> list[Child]:
        label = annotated[id(node)]
        if len(kids) <= 2:
            return [Tree(label, kids)]
        names = [_child_label(c) for c in node.children]
        if factor == "right":
            inner = Tree(context(label, names[-2:]), kids[-2:])
            for i in range(len(kids) - 3, 0, -1):
                inner = Tree(context(label, names[i:]), [kids[i], inner])
            return [Tree(label, [kids[0], inner])]
        inner = Tree(context(label, names[:2]), kids[:2])
        for i in range(2, len(kids) - 1):
            inner = Tree(context(label, names[:i + 1]), [inner, kids[i]])
        return [Tree(label, [inner, kids[-1]])]

    return rebuild(tree, visit)[0]  # type: ignore[return-value]


def unbinarize(tree: Tree) -> Tree:
    """Undo `binarize`: splice out every node whose label starts with BIN_MARK and drop the
    parent annotation (everything from the first PARENT_SEP)."""
    if tree.label.startswith(BIN_MARK):
        raise ValueError(f"the root {tree.label!r} is an intermediate binarization node")

    def visit(node: Tree, kids: list[Child]) -> list[Child]:
        if node.label.startswith(BIN_MARK):
            return kids
        return [Tree(node.label.split(PARENT_SEP, 1)[0], kids)]

    return rebuild(tree, visit)[0]  # type: ignore[return-value]


def collapse_unary(tree: Tree, keep_preterminals: bool = True) -> Tree:
    """Join every chain of single-child phrases into one node labeled "A¦B¦C".

    keep_preterminals: True (default) leaves a preterminal out of the chain, so (NP (N ferry))
    stays as it is and tags remain visible; False gives (NP¦N ferry).
    """
    _check_labels(tree, UNARY_SEP, "collapse unary chains")

    def visit(node: Tree, kids: list[Child]) -> list[Child]:
        if len(kids) == 1 and isinstance(kids[0], Tree):
            child = kids[0]
            if not (keep_preterminals and child.is_preterminal()):
                return [Tree(node.label + UNARY_SEP + child.label, child.children)]
        return [Tree(node.label, kids)]

    return rebuild(tree, visit)[0]  # type: ignore[return-value]


def expand_unary(tree: Tree) -> Tree:
    """Undo `collapse_unary`: a label "A¦B¦C" becomes the chain A -> B -> C."""
    def visit(node: Tree, kids: list[Child]) -> list[Child]:
        names = node.label.split(UNARY_SEP)
        out = Tree(names[-1], kids)
        for name in reversed(names[:-1]):
            out = Tree(name, [out])
        return [out]

    return rebuild(tree, visit)[0]  # type: ignore[return-value]


def has_transform_marks(labels: Iterable[str]) -> bool:
    """True if any of `labels` (a grammar's symbols, or a tree's labels) carries a mark of
    `binarize`, `collapse_unary` or parent annotation: a grammar estimated from a treebank."""
    return any(mark in label for label in labels for mark in (BIN_MARK, UNARY_SEP, PARENT_SEP))


def treebank_form(tree: Tree, relabel: Callable[[str], str] | None = None,
                  treebank: bool | None = None) -> Tree:
    """A decoded tree in the form of the treebank its grammar was read from: every label mapped
    by `relabel` (a refined grammar's subcategory `NAME·k` -> `NAME`, so that a joined chain's
    subcategory does not stick to its last label), then the chains split (`expand_unary`) and
    the binarization nodes spliced out (`unbinarize`). `treebank` says whether the grammar was
    estimated from `binarize`d and `collapse_unary`d trees (`has_transform_marks` of its
    symbols), so that every tree of one grammar is written alike; None decides from the tree's
    own labels. Other trees (an induced grammar's) come back as they are, and so does a tree
    whose root is a binarization node, which has no treebank form."""
    if treebank is None:
        treebank = has_transform_marks(node.label for node in tree.subtrees())
    if not treebank or tree.label.startswith(BIN_MARK):
        return tree
    if relabel is not None:
        def rename(node: Tree, kids: list[Child]) -> list[Child]:
            return [Tree(relabel(node.label), kids)]

        tree = rebuild(tree, rename)[0]  # type: ignore[assignment]
    return unbinarize(expand_unary(tree))


def insert_words(tree: Tree, words: list[str], kept: list[bool], tags: list[str]) -> Tree:
    """`tree` over the kept words of a sentence, with the others put back as preterminals
    (`tags[i]` over `words[i]`), so that it covers `words` again.

    A left-out word goes between the two children of the lowest node that holds its kept
    neighbours on either side (before or after the whole tree at the sentence's edges), so every
    bracket of `tree` keeps its kept words and gains only left-out words inside it: removing
    them again (as evaluation removes punctuation) gives back `tree`'s brackets exactly. This is
    how a grammar trained without some tags (`data.drop_tags`) parses a sentence that has them.
    The tree's own leaves are replaced by the kept words, in order.
    """
    positions = [i for i, keep in enumerate(kept) if keep]           # kept word -> position
    if len(positions) != len(tree):
        raise ValueError(f"the tree has {len(tree)} words, the sentence {len(positions)} kept")
    indexed = tree.with_leaves([str(k) for k in range(len(positions))])
    span: dict[int, tuple[int, int]] = {}                            # id(node) -> kept range

    def between(a: int, b: int) -> list[Child]:
        return [Tree(tags[i], [words[i]]) for i in range(a, b)]

    def visit(node: Tree, kids: list[Child]) -> list[Child]:
        out: list[Child] = []
        first = last = -1
        for kid in kids:
            if isinstance(kid, str):
                lo = hi = int(kid)
                kid = words[positions[lo]]
            else:
                lo, hi = span[id(kid)]
            if last >= 0:
                out.extend(between(positions[last] + 1, positions[lo]))
            else:
                first = lo
            out.append(kid)
            last = hi
        new = Tree(node.label, out)
        span[id(new)] = (first, last)
        return [new]

    top = rebuild(indexed, visit)[0]
    assert isinstance(top, Tree)
    if top.is_preterminal() and len(positions) < len(words):
        top = Tree(top.label, [top])  # one kept word: its tag gets the others beside it
    top.children[:0] = between(0, positions[0])
    top.children.extend(between(positions[-1] + 1, len(words)))
    return top
