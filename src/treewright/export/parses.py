"""Parsed corpora: bracketed trees, and CoNLL-U columns with the induced preterminals.

Trees are Viterbi trees (`inference.viterbi_parse`). A sentence without a parse is never
dropped: the bracketed output writes `(NOPARSE w1 w2 ...)` on its line, and the CoNLL-U output
keeps its tokens with `_` in the tag column and a `# parse = none` comment.

CoNLL-U output: one block per sentence, the 10 columns ID FORM LEMMA UPOS XPOS FEATS HEAD
DEPREL DEPS MISC. Only ID and FORM are filled, plus the tag column the user picks (XPOS by
default, or UPOS) with the label of the tree node right above each word: the induced
preterminal (for a grammar whose nonterminals emit words, that nonterminal). All other columns
are `_`: no lemmas, features or dependencies are induced. Comments per sentence: `sent_id`
(the input line number), `text` (the tokens joined by spaces) and `induced_tree` (the
bracketed tree) or `parse = none`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

from treewright.grammar import Grammar
from treewright.inference import viterbi_parse
from treewright.trees import Tree

NOPARSE = "NOPARSE"
TAG_COLUMNS = ("XPOS", "UPOS")
_COLUMNS = ("ID", "FORM", "LEMMA", "UPOS", "XPOS", "FEATS", "HEAD", "DEPREL", "DEPS", "MISC")


@dataclass
class ParsedSentence:
    """One input sentence: its line number, words, tree (None: no parse) and log-probability."""
    line: int
    words: list[str]
    tree: Tree | None
    logprob: float


def parse_corpus(grammar: Grammar, lines: Sequence[tuple[int, list[str]]],
                 mapping: dict[str, str] | None = None,
                 normalise: Callable[[str], str] | None = None) -> list[ParsedSentence]:
    """Viterbi trees of (line number, words) pairs, labels renamed by `mapping` if given.

    normalise: applied to each word before it is looked up in the grammar (as the training
    corpus was normalised, e.g. lowercased); the trees keep the words as written."""
    from treewright.export.rename import rename_tree

    lookup = [[normalise(x) for x in w] if normalise else list(w) for _, w in lines]
    results = viterbi_parse(grammar, lookup)
    out = []
    for (line, words), (tree, logp) in zip(lines, results):
        if tree is not None and normalise:
            tree = tree.with_leaves(words)
        if tree is not None and mapping:
            tree = rename_tree(tree, mapping)
        out.append(ParsedSentence(line, list(words), tree, logp))
    return out


def to_brackets(parsed: Sequence[ParsedSentence]) -> str:
    """One bracketed tree per line, in input order."""
    lines = []
    for p in parsed:
        lines.append(p.tree.to_string() if p.tree is not None
                     else Tree(NOPARSE, list(p.words)).to_string())
    return "\n".join(lines) + "\n"


def induced_tags(tree: Tree) -> list[str]:
    """The label of the node right above each word, left to right."""
    tags: list[str] = []
    for node in tree.subtrees():  # pre-order, so the words come out left to right
        for child in node.children:
            if isinstance(child, str):
                tags.append(node.label)
    return tags


def to_conllu(parsed: Sequence[ParsedSentence], tag_column: str = "XPOS") -> str:
    """The CoNLL-U text (see the module docstring). tag_column: "XPOS" (default) or "UPOS"."""
    if tag_column not in TAG_COLUMNS:
        raise ValueError(f"tag_column must be one of {TAG_COLUMNS}, not {tag_column!r}")
    where = _COLUMNS.index(tag_column)
    blocks = []
    for p in parsed:
        lines = [f"# sent_id = {p.line}", f"# text = {' '.join(p.words)}"]
        if p.tree is None:
            lines.append("# parse = none")
            tags = ["_"] * len(p.words)
        else:
            lines.append(f"# induced_tree = {p.tree.to_string()}")
            tags = induced_tags(p.tree)
        for k, (word, tag) in enumerate(zip(p.words, tags), start=1):
            row = [str(k), word] + ["_"] * 8
            row[where] = tag
            lines.append("\t".join(row))
        blocks.append("\n".join(lines) + "\n")
    # CoNLL-U ends every sentence with a blank line, the last one included.
    return "\n".join(blocks) + "\n"
