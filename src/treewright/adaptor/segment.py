"""Segmentation with an adaptor grammar: character input, the segmentation an analysis gives,
and the induced lexicon.

Utterance-level input is a line of text whose spaces, if any, are the gold segmentation: the
sampler sees only its characters. Word-level input (for morphs) is the same with one word per
line. An analysis segments its characters at the edges of the top-most subtrees of a chosen
symbol (Word in a unigram word grammar, a morph symbol inside words); characters that no such
subtree covers stay together between the edges around them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import regex

from treewright.adaptor.model import Cache, Tree, is_leaf, tree_yield
from treewright.corpus.lines import iter_lines


@dataclass(frozen=True)
class Utterances:
    """Lines of text as the sampler reads them and as the gold segmentation has them.

    characters  per utterance, its characters without white space
    gold        per utterance, its white-space separated words
    lines       per utterance, its line number in the file (from one)
    blank       the number of blank lines, which hold no utterance
    """

    characters: list[list[str]]
    gold: list[list[str]]
    lines: list[int]
    blank: int


_CLUSTER = regex.compile(r"\X")  # an extended grapheme cluster (Unicode Standard Annex #29)


def characters(text: str) -> list[str]:
    """The characters of a line with its white space taken out: `"ka lu"` -> k, a, l, u.

    A character is what a reader of the script takes as one (an extended grapheme cluster of
    Unicode Standard Annex #29), not a code point: a letter with its combining marks, or a
    consonant with its dependent vowel sign, is one character, so no segmentation cuts
    between them."""
    return [c for c in _CLUSTER.findall(text) if not c.isspace()]


def read_utterances(path: str | Path) -> Utterances:
    """Every non-blank line of a UTF-8 file (a byte-order mark at its start is not text), as
    characters and as gold words. InputError names the line of bytes that are not UTF-8."""
    return parse_utterances([text for _, text in iter_lines(path)])


def parse_utterances(lines: list[str]) -> Utterances:
    chars, gold, numbers, blank = [], [], [], 0
    for k, line in enumerate(lines, start=1):
        words = line.split()
        if not words:
            blank += 1
            continue
        chars.append(characters(line))
        gold.append(words)
        numbers.append(k)
    return Utterances(chars, gold, numbers, blank)


def top_spans(tree: Tree, symbol: int) -> list[tuple[int, int]]:
    """(start, end) of the top-most nodes labelled `symbol`, left to right."""
    out: list[tuple[int, int]] = []

    def walk(node: Tree, start: int) -> int:
        width = len(tree_yield(node))
        if node[0] == symbol:
            out.append((start, start + width))
        elif not is_leaf(node):
            walk(node[2], walk(node[1], start))
        return start + width

    walk(tree, 0)
    return out


def boundaries(tree: Tree, symbols: Sequence[int], length: int) -> list[int]:
    """The positions an analysis of `length` characters cuts at, ascending: every edge of a
    top-most node of any of `symbols` (position k lies between characters k - 1 and k; the
    utterance's own edges 0 and `length` are not positions)."""
    return sorted({k for a in symbols for span in top_spans(tree, a) for k in span}
                  - {0, length})


def cut(chars: Sequence[str], positions: Sequence[int]) -> list[str]:
    """`chars` cut at the ascending `positions` (each strictly inside), joined into units."""
    edges = [0, *positions, len(chars)]
    return ["".join(chars[i:j]) for i, j in zip(edges, edges[1:])]


def segment(tree: Tree, symbol: int, chars: list[str]) -> list[str]:
    """The words an analysis gives: `chars` cut at every edge of a top-most `symbol` node."""
    return cut(chars, boundaries(tree, (symbol,), len(chars)))


def lexicon(cache: Cache, symbol: int, words: list[str]) -> list[tuple[str, int, int]]:
    """The cached subtrees of an adapted symbol as (their characters joined, customers,
    tables), most customers first (ties by the string). Labels with the same characters
    (different subtrees) are listed apart. `words` are the grammar's terminals by id."""
    out = []
    for label, tables in cache.labels[symbol].items():
        text = "".join(words[w] for w in tree_yield(label))
        out.append((text, cache.label_customers[symbol][label], len(tables)))
    return sorted(out, key=lambda item: (-item[1], item[0]))
