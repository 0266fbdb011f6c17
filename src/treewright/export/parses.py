"""Parsed corpora: bracketed trees, and CoNLL-U columns with the induced preterminals and heads.

Trees are Viterbi trees (`inference.viterbi_parse`). A sentence without a parse is never
dropped: the bracketed output writes `(NOPARSE w1 w2 ...)` on its line, and the CoNLL-U output
keeps its tokens with `_` in the tag, HEAD and DEPREL columns and a `# parse = none` comment
(a CoNLL-U reader then reports that sentence's words as having no head).

Blank input lines (no words) are kept as `ParsedSentence`s with no words: the bracketed output
has an empty line for each, so output line k is input line k, as `treewright parse` writes;
CoNLL-U has no sentence without words, so its blocks are the non-blank lines, each naming its
input line in `# sent_id`.

CoNLL-U output: one block per sentence, the 10 columns ID FORM LEMMA UPOS XPOS FEATS HEAD
DEPREL DEPS MISC. Filled are ID and FORM; the tag column the user picks (XPOS by default, or
UPOS) with the label of the tree node right above each word: the induced preterminal (for a
grammar whose nonterminals emit words, that nonterminal); HEAD, the dependency tree read off the
induced tree by a head rule (`HeadRule`, `dependency_heads`), or for a lexicalized model the
heads of its own best derivation (`ParsedSentence.heads`); DEPREL, `root` for the word whose
head is 0 and `dep` (the Universal Dependencies label for an unspecified relation) for every
other word, since the grammar's symbols carry no relation names. LEMMA, FEATS, DEPS and MISC are
`_`. Comments per sentence: `sent_id` (the input line number), `text` (the tokens joined by
spaces), `induced_tree` (the bracketed tree) or `parse = none`, and `head_rule`. A CoNLL-U
corpus is written back line for line instead (`fill_parsed_conllu`): its own comments,
multiword-token lines, empty nodes and other columns stay, and only the tag column, HEAD and
DEPREL of its words and the comments above change.

Heads from a constituency tree by head percolation (Collins 1999, "Head-Driven Statistical
Models for Natural Language Parsing", PhD thesis, University of Pennsylvania): each phrase has
one head child; its head word is the head word of that child; the head word of every other
child depends on it; the head word of the whole tree depends on 0. Collins picks the head child
from tables per treebank label; induced symbols have no such tables, so the rule here picks a
side per symbol:

- "auto" (default): for each nonterminal A, the side whose child symbol the grammar predicts
  better, i.e. the lower entropy of p(B | A) (left children) against p(C | A) (right children)
  over A's binary rules. A head is chosen by its parent while its dependents vary; the choice
  follows the grammar, not a word order, and mirroring every rule of a grammar mirrors it.
  Exact ties go to the left child.
- "left" or "right": the same side for every phrase (head-initial or head-final throughout).

Converting the heads back to brackets gives the spans of each word's maximal projection (the
highest node it heads), which are constituents of the induced tree.

Given a function-word test (`function`), either kind of heads is then moved to the
content-head convention of Universal Dependencies (`head_conventions.content_heads`, over the
same tree), and the `head_rule` comment says so (`CONTENT_NOTE`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import torch

from treewright.decode import is_treebank_grammar, treebank_tree
from treewright.grammar import Grammar
from treewright.head_conventions import content_heads
from treewright.inference import viterbi_parse
from treewright.trees import Tree

NOPARSE = "NOPARSE"
TAG_COLUMNS = ("XPOS", "UPOS")
HEAD_RULES = ("auto", "left", "right")
ROOT_RELATION = "root"
MODEL_HEADS = "lexicalized model"   # the head_rule comment of heads a lexicalized model chose
CONTENT_NOTE = ", function words as dependents"   # added to it by a function-word test
RELATION = "dep"
_COLUMNS = ("ID", "FORM", "LEMMA", "UPOS", "XPOS", "FEATS", "HEAD", "DEPREL", "DEPS", "MISC")


@dataclass
class ParsedSentence:
    """One input line: its line number, words, tree (None: no parse, or a blank line) and
    log-probability (nan for a blank line); `heads`, when a lexicalized model gave them, the
    1-based head of every word (0: the root), which `to_conllu` writes instead of the rule's;
    `treebank`, whether the tree's grammar is a treebank's (`decode.is_treebank_grammar`),
    whose trees are written in the treebank's form."""
    line: int
    words: list[str]
    tree: Tree | None
    logprob: float
    heads: list[int] | None = None
    treebank: bool = False

    @property
    def blank(self) -> bool:
        return not self.words


def parse_corpus(grammar: Grammar | None, lines: Sequence[tuple[int, list[str]]],
                 mapping: dict[str, str] | None = None,
                 normalise: Callable[[str], str] | None = None,
                 decoder: Callable[[list[list[str]]], list[tuple[Tree | None, float,
                                                                  list[int] | None]]]
                 | None = None) -> list[ParsedSentence]:
    """Viterbi trees of (line number, words) pairs, labels renamed by `mapping` if given. A
    pair with no words (a blank line) is kept, unparsed (see the module docstring).

    normalise: applied to each word before it is looked up in the grammar (as the training
    corpus was normalised, e.g. lowercased); the trees keep the words as written.
    decoder: instead of the grammar's Viterbi trees, (tree, log-probability, heads) of each
    non-blank sentence's looked-up words, in order (a lexicalized model's best derivations,
    heads None when it has no parse)."""
    from treewright.export.rename import rename_tree

    lookup = [[normalise(x) for x in w] if normalise else list(w) for _, w in lines if w]
    if decoder is None:
        decoded = [(tree, logp, None) for tree, logp in viterbi_parse(grammar, lookup)] \
            if lookup else []
    else:
        decoded = decoder(lookup) if lookup else []
    found = iter(decoded)
    results = [next(found) if words else (None, math.nan, None) for _, words in lines]
    treebank = grammar is not None and is_treebank_grammar([grammar])
    out = []
    for (line, words), (tree, logp, heads) in zip(lines, results):
        if tree is not None and normalise:
            tree = tree.with_leaves(words)
        if tree is not None and mapping:
            tree = rename_tree(tree, mapping)
        out.append(ParsedSentence(line, list(words), tree, logp, heads, treebank))
    return out


def to_brackets(parsed: Sequence[ParsedSentence]) -> str:
    """One bracketed tree per line, in input order; an empty line for a blank input line."""
    lines = []
    for p in parsed:
        lines.append("" if p.blank else treebank_tree(p.tree, p.treebank).to_string()
                     if p.tree is not None
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


@dataclass(frozen=True)
class HeadRule:
    """Which child of a phrase carries its head word: "left" (the first child) or "right" (the
    last), `sides[label]` for a listed label, else `fallback`. `name` is what the CoNLL-U
    comment `head_rule` records. A node with one child is headed by it whatever the side."""
    name: str
    fallback: str = "left"
    sides: Mapping[str, str] = field(default_factory=dict)

    def side(self, label: str) -> str:
        return self.sides.get(label, self.fallback)


def head_rule(choice: str = "auto", grammar: Grammar | None = None) -> HeadRule:
    """The head rule named `choice` (see the module docstring); "auto" reads `grammar`."""
    if choice not in HEAD_RULES:
        raise ValueError(f"head rule must be one of {HEAD_RULES}, not {choice!r}")
    if choice != "auto":
        return HeadRule(choice, choice)
    if grammar is None:
        raise ValueError("the auto head rule reads the grammar's rules; give the grammar")
    return HeadRule("auto", "left", auto_head_sides(grammar))


def auto_head_sides(grammar: Grammar) -> dict[str, str]:
    """Per nonterminal with binary rules, the side of lower child-symbol entropy (ties: left)."""
    binary = grammar.binary.double()                                    # (NT, S, S) log-probs
    joint = torch.softmax(binary.flatten(1), 1).view_as(binary)         # p(B, C | A, binary)
    sides = {}
    for a, name in enumerate(grammar.nonterminals):
        if not torch.isfinite(binary[a]).any():
            continue
        left, right = joint[a].sum(1), joint[a].sum(0)                  # (S,) marginals
        h_left, h_right = _entropy(left), _entropy(right)
        sides[name] = "right" if h_right < h_left else "left"
    return sides


def _entropy(p: torch.Tensor) -> float:
    p = p[p > 0]
    return float(-(p * p.log()).sum())


def dependency_heads(tree: Tree, rule: HeadRule) -> list[int]:
    """CoNLL-U HEAD values of `tree`'s words (1-based word positions, 0 for the root), by head
    percolation under `rule` (see the module docstring). Iterative: deep trees are fine."""
    heads = [0] * len(tree)
    # 1-based word positions, keyed by (id(node), child index), so that a node holding words
    # beside phrases numbers them in order too.
    position = {(id(node), k): number
                for number, (node, k, _) in enumerate(tree.word_slots(), start=1)}
    head_word: dict[int, int] = {}   # id(node) -> 1-based position of its head word
    stack: list[tuple[Tree, bool]] = [(tree, False)]
    while stack:  # post-order: every child's head word is known before its parent's
        node, done = stack.pop()
        if not done:
            stack.append((node, True))
            stack.extend((c, False) for c in node.children if isinstance(c, Tree))
            continue
        below = [position[(id(node), k)] if isinstance(c, str) else head_word[id(c)]
                 for k, c in enumerate(node.children)]
        head = below[0] if rule.side(node.label) == "left" else below[-1]
        for word in below:
            if word != head:
                heads[word - 1] = head
        head_word[id(node)] = head
    return heads


def to_conllu(parsed: Sequence[ParsedSentence], tag_column: str = "XPOS", *,
              rule: HeadRule, function: Callable[[str], bool] | None = None) -> str:
    """The CoNLL-U text (see the module docstring). tag_column: "XPOS" (default) or "UPOS".
    rule: the head rule, from `head_rule` (the default choice, "auto", needs the grammar whose
    symbols label the trees). function: whether a word is a function word, to write the heads
    in the content-head convention (None: as the rule or the model gives them)."""
    where = _tag_index(tag_column)
    blocks = []
    for p in parsed:
        if p.blank:
            continue  # no CoNLL-U sentence has no words; sent_id keeps the lines apart
        comments, tags, heads = _induced(p, rule, function)
        lines = [f"# sent_id = {p.line}", f"# text = {' '.join(p.words)}", *comments]
        for k, (word, tag, head) in enumerate(zip(p.words, tags, heads), start=1):
            row = [str(k), word] + ["_"] * 8
            row[where] = tag
            if head is not None:
                row[6] = str(head)
                row[7] = ROOT_RELATION if head == 0 else RELATION
            lines.append("\t".join(row))
        blocks.append("\n".join(lines) + "\n")
    # CoNLL-U ends every sentence with a blank line, the last one included.
    return "\n".join(blocks) + "\n"


def fill_parsed_conllu(path: str, parsed: Sequence[ParsedSentence], tag_column: str = "XPOS",
                       *, rule: HeadRule, function: Callable[[str], bool] | None = None) -> str:
    """The CoNLL-U file at `path`, whose sentence blocks `parsed` are (one each, in order,
    as `cli.common.read_lines` reads them), with the columns and comments `to_conllu` writes
    filled in: the induced preterminal in `tag_column`, HEAD, DEPREL (`root`, `dep`), and the
    `induced_tree` (or `parse = none`) and `head_rule` comments after the block's own. Every
    other line and column stays as read (`sent_id`, `text`, multiword-token lines, empty nodes,
    LEMMA, the other tag column, FEATS, DEPS, MISC), so nothing of the input is lost
    (`export.heads.fill_heads_conllu`). function: as for `to_conllu`."""
    from treewright.export.heads import fill_heads_conllu

    where = _tag_index(tag_column)
    induced = [_induced(p, rule, function) for p in parsed if not p.blank]
    heads = [None if any(h is None for h in mine) else list(mine) for _, _, mine in induced]
    return fill_heads_conllu(path, heads, relations=(ROOT_RELATION, RELATION),
                             tags=[tags for _, tags, _ in induced], tag_column=where,
                             comments=[comments for comments, _, _ in induced],
                             replaces=("induced_tree", "head_rule", "parse"))


def _tag_index(tag_column: str) -> int:
    if tag_column not in TAG_COLUMNS:
        raise ValueError(f"tag_column must be one of {TAG_COLUMNS}, not {tag_column!r}")
    return _COLUMNS.index(tag_column)


def _induced(p: ParsedSentence, rule: HeadRule, function: Callable[[str], bool] | None = None
             ) -> tuple[list[str], list[str], list[int | None]]:
    """(comments, tags, heads) of one parsed sentence: `induced_tree` and `head_rule`, or
    `parse = none` with `_` tags and no heads; with `function`, the heads in the content-head
    convention."""
    if p.tree is None:
        return ["# parse = none"], ["_"] * len(p.words), [None] * len(p.words)
    # Written in the treebank's form (`decode.treebank_tree`), as `to_brackets` writes it; the
    # heads come from the grammar's own tree, whose symbols the rule names.
    shown = treebank_tree(p.tree, p.treebank)
    comments = [f"# induced_tree = {shown.to_string()}"]
    name, given = (MODEL_HEADS, list(p.heads)) if p.heads is not None else \
        (rule.name, dependency_heads(p.tree, rule))
    if function is not None:
        given = content_heads(p.tree, given, [function(w) for w in p.words])
        name += CONTENT_NOTE
    comments.append(f"# head_rule = {name}")
    return comments, induced_tags(shown), list(given)
