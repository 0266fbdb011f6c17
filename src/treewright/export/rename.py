"""Renaming induced symbols (N3, P7, ...) to names of the user's own.

Mapping file format (ours): one `OLD NEW` pair per line, separated by whitespace; `#` starts a
comment that runs to the end of the line; blank lines are ignored. Symbols not listed keep
their names. A name may not contain whitespace, brackets or a double quote, start with `@`,
or be `->` (the grammar text format and bracketed trees could not be read back otherwise).

    # a mapping for a grammar of the harbour language
    N0  CLAUSE
    P3  BOAT-WORD

Errors (InputError naming file and line): a malformed line, an OLD name the grammar does not
have, an OLD name listed twice, two OLD names given the same NEW name, or a NEW name that is
already the name of a symbol that keeps it. Swaps (A B and B A) are allowed.
"""

from __future__ import annotations

import re
from pathlib import Path

from treewright.errors import InputError
from treewright.grammar import Grammar
from treewright.trees import Tree

_BAD_NAME = re.compile(r'[\s()"]')


def read_renaming(path: str | Path) -> dict[str, tuple[str, int]]:
    """The pairs of a mapping file as {OLD: (NEW, line)}; checks the format and repeats only
    (the names are checked against a grammar by `check_renaming`)."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("no such renaming file", path=str(path)) from None
    except UnicodeDecodeError as err:
        raise InputError(f"not UTF-8 text (byte {err.start})", path=str(path)) from None
    return parse_renaming(text, str(path))


def parse_renaming(text: str, source: str = "<string>") -> dict[str, tuple[str, int]]:
    pairs: dict[str, tuple[str, int]] = {}
    targets: dict[str, int] = {}
    for lineno, raw in enumerate(text.lstrip("\ufeff").splitlines(), start=1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        parts = line.split()
        if len(parts) != 2:
            raise InputError(f"expected 'OLD NEW', got {line!r}", path=source, line=lineno)
        old, new = parts
        if _BAD_NAME.search(new) or new == "->" or new.startswith("@"):
            raise InputError(f"the new name {new!r} may not contain whitespace, brackets or a "
                             "double quote, start with '@', nor be '->'", path=source,
                             line=lineno)
        if old in pairs:
            raise InputError(f"{old} is renamed twice (first on line {pairs[old][1]})",
                             path=source, line=lineno)
        if new in targets:
            raise InputError(f"two symbols would be called {new} (the first on line "
                             f"{targets[new]})", path=source, line=lineno)
        pairs[old] = (new, lineno)
        targets[new] = lineno
    return pairs


def check_renaming(grammar: Grammar, pairs: dict[str, tuple[str, int]],
                   source: str = "<string>") -> dict[str, str]:
    """{OLD: NEW} for `grammar` after checking every name (see the module docstring)."""
    names = set(grammar.symbols) | {grammar.start}
    for old, (new, line) in pairs.items():
        if old not in names:
            raise InputError(f"the grammar has no symbol {old}", path=source, line=line)
    for old, (new, line) in pairs.items():
        if new in names and new not in pairs:
            raise InputError(f"{new} is already the name of a symbol that keeps it; rename "
                             f"that symbol too, or choose another name for {old}",
                             path=source, line=line)
    return {old: new for old, (new, _) in pairs.items()}


def load_renaming(path: str | Path, grammar: Grammar) -> dict[str, str]:
    """Read and check a mapping file against `grammar`."""
    return check_renaming(grammar, read_renaming(path), str(path))


def rename_grammar(grammar: Grammar, mapping: dict[str, str]) -> Grammar:
    """The same grammar (same tensors, so the same scores) with symbols renamed."""
    def name(x: str) -> str:
        return mapping.get(x, x)
    return Grammar([name(x) for x in grammar.nonterminals], [name(x) for x in grammar.preterminals],
                   grammar.vocab, grammar.root, grammar.binary, grammar.lexical,
                   name(grammar.start))


def rename_tree(tree: Tree, mapping: dict[str, str]) -> Tree:
    """A copy of `tree` with its labels renamed (words unchanged)."""
    out = Tree(mapping.get(tree.label, tree.label))
    stack = [(tree, out)]
    while stack:  # iterative: deep trees
        src, dst = stack.pop()
        for child in src.children:
            if isinstance(child, str):
                dst.children.append(child)
            else:
                copy = Tree(mapping.get(child.label, child.label))
                dst.children.append(copy)
                stack.append((child, copy))
    return out
