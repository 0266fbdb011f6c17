"""Bracketed (s-expression) trees: an iterative parser and the usual clean-ups.

Syntax: `(LABEL child ...)` where a child is a word or another bracket; any labels, any number of
children, one tree per line or spread over many lines. A root wrapper with no label,
`( (S ...))`, is removed. Words and labels are kept exactly as written (so `-LRB-` stays
`-LRB-`). The parser keeps its own stack, so a tree 5,000 levels deep reads fine.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Iterable, Iterator

from treewright.errors import InputError
from treewright.trees import Child, Tree
from treewright.corpus.types import ReadOptions
from treewright.corpus.walk import rebuild

_TOKEN = re.compile(r"\(|\)|[^\s()]+")


@dataclass
class BracketRecord:
    """One top-level bracket from a file: a tree, or the error that spoilt it."""
    line: int
    column: int
    tree: Tree | None = None
    error: InputError | None = None


class _Frame:
    __slots__ = ("label", "children", "line", "column", "awaiting_label")

    def __init__(self, line: int, column: int):
        self.label: str | None = None
        self.children: list[Child] = []
        self.line = line
        self.column = column
        self.awaiting_label = True


def iter_bracket_records(lines: Iterable[tuple[int, str]], path: str) -> Iterator[BracketRecord]:
    """Yield every top-level bracket of the numbered `lines`, in order.

    A malformed bracket (unbalanced, empty label, stray text) becomes a record with `error` set
    to an InputError naming `path`, line and column; reading goes on after it.
    """
    stack: list[_Frame] = []
    error: InputError | None = None  # the first problem inside the current tree
    start = (0, 0)

    def fail(message: str, line: int, column: int) -> None:
        nonlocal error
        if error is None:
            error = InputError(message, path=path, line=line, column=column)

    last_line = 0
    for number, text in lines:
        last_line = number
        stray_reported = False
        for match in _TOKEN.finditer(text):
            token, column = match.group(), match.start() + 1
            if not stack:
                if token == "(":
                    stack.append(_Frame(number, column))
                    start, error, stray_reported = (number, column), None, False
                elif token == ")":
                    yield BracketRecord(number, column, error=InputError(
                        "a closing bracket with no opening bracket", path, number, column))
                elif not stray_reported:  # one record per line of stray text, not per word
                    stray_reported = True
                    yield BracketRecord(number, column, error=InputError(
                        f"text {token!r} outside any bracket", path, number, column))
                continue
            top = stack[-1]
            if token == "(":
                if top.awaiting_label:
                    top.awaiting_label = False
                    if len(stack) > 1:
                        fail("a bracket has no label", top.line, top.column)
                stack.append(_Frame(number, column))
            elif token == ")":
                stack.pop()
                if top.awaiting_label:
                    fail("empty brackets ()", top.line, top.column)
                elif not top.children:
                    fail(f"({top.label}) has nothing under it", top.line, top.column)
                if stack:
                    if error is None:
                        stack[-1].children.append(Tree(top.label, top.children))
                    continue
                if error is None:
                    tree = _unwrap(top, path)
                    if isinstance(tree, InputError):
                        error = tree
                yield BracketRecord(*start, tree=None if error else tree, error=error)
            elif top.awaiting_label:
                top.awaiting_label = False
                top.label = token
            else:
                top.children.append(token)
    if stack:
        outer = stack[0]
        fail(f"bracket opened at line {outer.line}, column {outer.column} is never closed "
             f"(file ends at line {last_line})", outer.line, outer.column)
        yield BracketRecord(*start, error=error)


def _unwrap(frame: _Frame, path: str) -> Tree | InputError:
    """The finished outermost bracket as a Tree; an unlabeled wrapper around one tree is
    dropped (the Penn Treebank writes `( (S ...))`)."""
    if frame.label is not None:
        return Tree(frame.label, frame.children)
    if len(frame.children) == 1 and isinstance(frame.children[0], Tree):
        return frame.children[0]
    return InputError("a root bracket with no label must hold exactly one tree", path,
                      frame.line, frame.column)


def parse_brackets(text: str, path: str = "<string>") -> list[Tree]:
    """Every tree in `text` (no clean-up); raises InputError at the first malformed one."""
    out = []
    # Lines end at \n, \r\n or \r only, numbered as `iter_lines` and an editor number them.
    lines = enumerate(re.split(r"\r\n|\r|\n", text), start=1)
    for record in iter_bracket_records(lines, path):
        if record.error is not None:
            raise record.error
        out.append(record.tree)
    return out


def strip_label(label: str) -> str:
    """Drop function tags and co-indices: NP-SBJ-1 -> NP, NP=2 -> NP, PP-LOC=3 -> PP.

    A label that starts with '-' (-NONE-, -LRB-, -RRB-) is a name of its own and kept whole.
    """
    if label.startswith("-"):
        return label
    cut = len(label)
    for sep in "-=":
        at = label.find(sep)
        if at > 0:
            cut = min(cut, at)
    return label[:cut]


def clean_tree(tree: Tree, options: ReadOptions) -> Tree | None:
    """`tree` after the removals that `options` ask for; None if nothing is left.

    Removes empty elements (labels in `empty_labels`, with their traces), preterminals whose
    label is in `punct_labels`, words in `punct_words`, and every node left with no children;
    strips function tags and co-indices when `strip_function_tags`.
    """
    def visit(node: Tree, kids: list[Child]) -> list[Child]:
        if options.remove_empty and node.label in options.empty_labels:
            return []
        label = strip_label(node.label) if options.strip_function_tags else node.label
        if node.is_preterminal() and (label in options.punct_labels
                                      or node.label in options.punct_labels):
            return []
        if options.punct_words:
            kids = [k for k in kids if not (isinstance(k, str) and k in options.punct_words)]
        return [Tree(label, kids)] if kids else []

    kept = rebuild(tree, visit)
    return kept[0] if kept else None  # type: ignore[return-value]


def preterminal_tags(tree: Tree) -> list[str] | None:
    """The preterminal label above each word, in word order; None if some word hangs directly
    under a phrase (then the tree has no tag sequence)."""
    tags: list[str] = []
    for node in tree.subtrees():  # pre-order, left to right: the order of the words
        if node.is_preterminal():
            tags.append(node.label)
        elif any(isinstance(c, str) for c in node.children):
            return None
    return tags
