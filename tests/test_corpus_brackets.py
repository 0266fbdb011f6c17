"""Bracketed trees: the parser against NLTK's `Tree.fromstring` (test-only reference), the
clean-ups, deep trees, and every kind of malformed input."""

from __future__ import annotations

import nltk
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from treewright.corpus import (PTB_PUNCT_LABELS, ReadOptions, clean_tree, depth, parse_brackets,
                               read_corpus, strip_label, trees_equal, write_skip_log)
from treewright.errors import InputError
from treewright.trees import Tree

RAW = ReadOptions(remove_empty=False, strip_function_tags=False)


def from_nltk(node) -> Tree | str:
    if isinstance(node, str):
        return node
    return Tree(node.label(), [from_nltk(c) for c in node])


def nltk_reference(text: str) -> Tree:
    """NLTK's reading, with the unlabeled root wrapper of `( (S ...))` removed (NLTK keeps it
    as a node labeled '')."""
    tree = from_nltk(nltk.Tree.fromstring(text))
    if tree.label == "" and len(tree.children) == 1:
        tree = tree.children[0]
    return tree


# No whitespace or brackets (they delimit items), and no backslash: NLTK reads "\\)" as an
# escaped bracket, a convention of its own that bracketed treebanks do not share.
symbol = st.text(st.characters(blacklist_categories=("Cs", "Z", "Cc"),
                               blacklist_characters="()\\\u0085"), min_size=1, max_size=4)


@st.composite
def trees(draw, max_depth: int = 4) -> Tree:
    label = draw(symbol)
    if max_depth == 0:
        return Tree(label, [draw(symbol)])
    kids = draw(st.lists(st.one_of(symbol, trees(max_depth=max_depth - 1)), min_size=1,
                         max_size=4))
    return Tree(label, kids)


def render(tree: Tree | str, gaps: list[str]) -> str:
    """The tree as brackets, with the given whitespace (spaces, tabs, newlines) between
    items, so trees spread over lines are covered too."""
    if isinstance(tree, str):
        return tree
    gap = gaps[len(tree.children) % len(gaps)]
    return "(" + tree.label + gap + gap.join(render(c, gaps) for c in tree.children) + ")"


@settings(max_examples=100, deadline=None)
@given(trees(), st.lists(st.sampled_from([" ", "\n", "\t ", " \r\n  "]), min_size=1,
                         max_size=3))
def test_parser_matches_nltk_on_generated_trees(tree, gaps):
    text = render(tree, gaps)
    ours = parse_brackets(text)
    assert len(ours) == 1
    reference = nltk_reference(text)  # NLTK Tree.fromstring
    assert trees_equal(ours[0], reference)
    assert trees_equal(ours[0], tree)
    assert ours[0].leaves() == reference.leaves()


AWKWARD = [
    "( (S (NP-SBJ (DT The) (NN ferry)) (VP (VBD left))))",  # PTB root wrapper
    "(S\n  (NP (-LRB- -LRB-) (NN x) (-RRB- -RRB-))\n\t(VP (V y)))",  # -LRB- kept, over lines
    "(S a (NP b c) d)",  # words beside phrases
    "(A (B (C (D (E w)))))",  # unary chain
    "(NP=2 (X *) (Y\u00e9\u4e2d \u00e9\u4e2d))",  # co-index, non-ASCII
    "((X a))",  # wrapper with no space
    "(S (:  :) (, ,) (`` ``) ('' ''))",  # punctuation-like labels
]


@pytest.mark.parametrize("text", AWKWARD)
def test_parser_matches_nltk_on_awkward_trees(text):
    ours = parse_brackets(text)
    reference = nltk_reference(text)  # NLTK Tree.fromstring
    assert len(ours) == 1 and trees_equal(ours[0], reference)


def test_several_trees_per_file_and_over_lines(tmp_path):
    path = tmp_path / "trees.mrg"
    path.write_text("(S (A a)\n   (B b))\n(S (C c)) (S (D d))\n", encoding="utf-8")
    corpus = read_corpus(path)
    assert corpus.report.fmt == "brackets"  # auto: first character is '('
    assert [s.words for s in corpus.sentences] == [["a", "b"], ["c"], ["d"]]
    assert [s.line for s in corpus.sentences] == [1, 3, 3]
    assert [s.tags for s in corpus.sentences] == [["A", "B"], ["C"], ["D"]]


@pytest.mark.parametrize("label,expected", [
    # Penn Treebank conventions (common practice): function tags after '-', indices after
    # '-' or '='; labels that begin with '-' are names of their own.
    ("NP-SBJ-1", "NP"), ("NP=2", "NP"), ("PP-LOC=3", "PP"), ("S-TPC-1", "S"),
    ("-LRB-", "-LRB-"), ("-NONE-", "-NONE-"), ("PRP$", "PRP$"), ("WHNP-1", "WHNP"), ("NP", "NP"),
])
def test_strip_label(label, expected):
    assert strip_label(label) == expected


def test_clean_tree_removes_traces_and_empty_nodes():
    (tree,) = parse_brackets(
        "( (S (NP-SBJ-1 (-NONE- *T*-1)) (VP (VBD sailed) (NP (-NONE- *)) (ADVP-TMP (RB late)))"
        " (. .)))")
    cleaned = clean_tree(tree, ReadOptions())
    # Hand-worked: NP-SBJ-1 and the object NP held only empty elements, so they go too.
    assert cleaned.to_string() == "(S (VP (VBD sailed) (ADVP (RB late))) (. .))"
    no_punct = clean_tree(tree, ReadOptions(punct_labels=PTB_PUNCT_LABELS))
    assert no_punct.to_string() == "(S (VP (VBD sailed) (ADVP (RB late))))"
    by_word = clean_tree(tree, ReadOptions(punct_words=frozenset({".", "late"})))
    assert by_word.to_string() == "(S (VP (VBD sailed)))"
    kept = clean_tree(tree, RAW)
    assert trees_equal(kept, tree)


def test_tree_with_nothing_left_is_counted(tmp_path):
    path = tmp_path / "t.mrg"
    path.write_text("(S (-NONE- *))\n(S (N x))\n", encoding="utf-8")
    corpus = read_corpus(path)
    assert corpus.report.sentences_read == 2 and corpus.report.sentences_used == 1
    assert corpus.report.skipped_by_reason == {"empty": 1}
    assert corpus.report.skipped[0].line == 1


def test_deep_tree_reads_without_recursion(tmp_path):
    levels = 5000  # past Python's default recursion limit of 1000
    path = tmp_path / "deep.mrg"
    path.write_text("(A " * levels + "w" + ")" * levels + "\n", encoding="utf-8")
    corpus = read_corpus(path)
    tree = corpus.sentences[0].tree
    # Reference: the tree was written with exactly `levels` brackets around one word.
    assert depth(tree) == levels
    assert tree.leaves() == ["w"] and corpus.sentences[0].tags == ["A"]


def test_tag_mode_uses_preterminals(tmp_path):
    path = tmp_path / "t.mrg"
    path.write_text("(S (N Ferry) (V left))\n(S x (N y))\n", encoding="utf-8")
    corpus = read_corpus(path, options=ReadOptions(tag_mode=True, lowercase=True))
    assert corpus.sentences[0].tokens == ["N", "V"]  # tags are never lowercased
    assert corpus.sentences[0].words == ["Ferry", "left"]
    assert corpus.report.skipped_by_reason == {"no_tags": 1}


MALFORMED = [
    # (text of line 2, column, words in the message)
    ("(S (N a)))", 10, "closing bracket with no opening"),
    ("stray (S (N a))", 1, "outside any bracket"),
    ("(S ((N a)))", 4, "no label"),
    ("(S () (N a))", 4, "empty brackets"),
    ("(S (N) (N a))", 4, "nothing under it"),
    ("( (N a) (N b))", 1, "exactly one tree"),
]


@pytest.mark.parametrize("bad,column,words", MALFORMED)
def test_malformed_tree_names_file_line_and_column(tmp_path, bad, column, words):
    path = tmp_path / "bad.mrg"
    path.write_text(f"(S (N one))\n{bad}\n(S (N three))\n", encoding="utf-8")
    with pytest.raises(InputError) as err:
        read_corpus(path)
    assert (err.value.path, err.value.line, err.value.column) == (str(path), 2, column)
    assert f"{path}, line 2, column {column}" in str(err.value) and words in str(err.value)

    corpus = read_corpus(path, options=ReadOptions(skip_bad=True))
    report = corpus.report
    # No sentence goes missing: lines 1 and 3 are used, line 2 is listed as malformed. A
    # bad line holding a tree as well may yield that tree too.
    assert {s.line for s in corpus.sentences} >= {1, 3}
    assert report.sentences_read == report.sentences_used + report.sentences_skipped
    assert [(r.reason, r.line, r.column) for r in report.skipped] == [("malformed", 2, column)]
    log = tmp_path / "skipped.log"
    assert write_skip_log(report, log) == 1
    assert log.read_text(encoding="utf-8").splitlines() == [report.skipped[0].format()]
    assert f"line 2, column {column}" in log.read_text(encoding="utf-8")


def test_unclosed_bracket_names_where_it_opened(tmp_path):
    path = tmp_path / "bad.mrg"
    path.write_text("(S (N one))\n(S (N two)\n\n", encoding="utf-8")
    with pytest.raises(InputError) as err:
        read_corpus(path)
    assert (err.value.line, err.value.column) == (2, 1)
    assert "never closed" in str(err.value) and str(path) in str(err.value)
    corpus = read_corpus(path, options=ReadOptions(skip_bad=True))
    assert corpus.report.sentences_read == 2 and corpus.report.skipped_by_reason == {
        "malformed": 1}
