"""An iterative bottom-up rebuild of a tree, shared by the cleaners and the transforms.

Trees from strangers may nest thousands of levels deep, past Python's recursion limit, so no
corpus code walks a tree by recursion.
"""

from __future__ import annotations

from typing import Callable

from treewright.trees import Child, Tree

# visit(original node, its rebuilt children) -> what replaces the node in its parent:
# [] removes it, [tree] replaces it, several items are spliced in its place.
Visit = Callable[[Tree, list[Child]], list[Child]]


def rebuild(tree: Tree, visit: Visit) -> list[Child]:
    """Rebuild `tree` bottom-up with `visit` applied to every node (words are passed through
    to their parent's `visit` untouched); returns what replaces the root."""
    result: list[Child] = []
    stack: list[tuple[Tree, object, list[Child]]] = [(tree, iter(tree.children), [])]
    while stack:
        node, pending, kids = stack[-1]
        for child in pending:  # resumes where this node's scan stopped
            if isinstance(child, str):
                kids.append(child)
            else:
                stack.append((child, iter(child.children), []))
                break
        else:
            stack.pop()
            (stack[-1][2] if stack else result).extend(visit(node, kids))
    return result


def depth(tree: Tree) -> int:
    """Number of node levels on the longest root-to-word path (a preterminal alone is 1)."""
    deepest = 0
    stack = [(tree, 1)]
    while stack:
        node, level = stack.pop()
        deepest = max(deepest, level)
        stack.extend((c, level + 1) for c in node.children if isinstance(c, Tree))
    return deepest


def trees_equal(a: Tree, b: Tree) -> bool:
    """Structural equality without recursion (the dataclass `==` recurses)."""
    stack: list[tuple[Child, Child]] = [(a, b)]
    while stack:
        x, y = stack.pop()
        if isinstance(x, str) or isinstance(y, str):
            if x != y:
                return False
            continue
        if x.label != y.label or len(x.children) != len(y.children):
            return False
        stack.extend(zip(x.children, y.children))
    return True
