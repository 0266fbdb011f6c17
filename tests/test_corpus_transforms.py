"""Binarization and unary collapsing: labels against NLTK's tree transforms (test-only
reference), and exact round trips on the Turkish Web Treebank and on generated trees."""

from __future__ import annotations

import os
import sysconfig

import nltk
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nltk.tree import transforms as nltk_transforms

from treewright.corpus import (BIN_MARK, PARENT_SEP, UNARY_SEP, ReadOptions, binarize,
                               collapse_unary, depth, expand_unary, read_corpus, trees_equal,
                               unbinarize)
from treewright.trees import Tree

VARIANTS = [(f, h, v) for f in ("right", "left") for h in (None, 0, 1, 2) for v in (1, 2, 3)]


def to_nltk(tree):
    if isinstance(tree, str):
        return tree
    return nltk.Tree(tree.label, [to_nltk(c) for c in tree.children])


def from_nltk(node, relabel=lambda s: s):
    if isinstance(node, str):
        return node
    return Tree(relabel(node.label()), [from_nltk(c, relabel) for c in node])


def nltk_label_to_ours(label: str) -> str:
    """NLTK writes X|<A-B>^<P-G>; ours is ¤XˆPˆG¤A¤B (same information, own separators)."""
    parents = ""
    if "^<" in label:
        label, rest = label.split("^<", 1)
        parents = "".join(PARENT_SEP + p for p in rest[:-1].split("-"))
    if "|<" not in label:
        return label + parents
    base, context = label.split("|<", 1)
    parts = [p for p in context[:-1].split("-") if p]
    return BIN_MARK.join([BIN_MARK + base + parents] + parts)


# Labels free of NLTK's own separators ('|', '^', '<', '>', '-') so its output can be read back.
label = st.sampled_from(["S", "NP", "VP", "PP", "A", "B"])
word = st.sampled_from(["ferry", "salt", "gull", "Ossel"])


@st.composite
def homogeneous(draw, max_depth: int = 4) -> Tree:
    """Words only under preterminals, as NLTK's chomsky_normal_form assumes."""
    if max_depth == 0 or draw(st.booleans()) and max_depth < 4:
        return Tree(draw(label), [draw(word)])
    kids = draw(st.lists(homogeneous(max_depth=max_depth - 1), min_size=1, max_size=5))
    return Tree(draw(label), kids)


@st.composite
def any_tree(draw, max_depth: int = 4) -> Tree:
    """Words anywhere, unary chains, wide nodes."""
    if max_depth == 0:
        return Tree(draw(label), [draw(word)])
    kids = draw(st.lists(st.one_of(word, any_tree(max_depth=max_depth - 1)), min_size=1,
                         max_size=5))
    return Tree(draw(label), kids)


@settings(max_examples=120, deadline=None)
@given(homogeneous(), st.sampled_from(VARIANTS))
def test_binarize_matches_nltk_chomsky_normal_form(tree, variant):
    factor, horizontal, vertical = variant
    reference = to_nltk(tree)
    # NLTK's vertMarkov counts ancestors (0 = none); ours counts levels (1 = none).
    nltk_transforms.chomsky_normal_form(reference, factor=factor, horzMarkov=horizontal,
                                        vertMarkov=vertical - 1)
    ours = binarize(tree, factor, horizontal, vertical)
    assert trees_equal(ours, from_nltk(reference, nltk_label_to_ours))


@settings(max_examples=120, deadline=None)
@given(homogeneous(), st.booleans())
def test_collapse_unary_matches_nltk(tree, keep_preterminals):
    # Homogeneous trees only: NLTK takes any node whose first child is a word for a tag, ours
    # only a node over exactly one word (Tree.is_preterminal); the two agree on these trees.
    reference = to_nltk(tree)
    nltk_transforms.collapse_unary(reference, collapsePOS=not keep_preterminals,
                                   collapseRoot=True, joinChar="+")
    ours = collapse_unary(tree, keep_preterminals)
    assert trees_equal(ours, from_nltk(reference, lambda s: s.replace("+", UNARY_SEP)))


@settings(max_examples=100, deadline=None)
@given(any_tree(), st.sampled_from(VARIANTS), st.booleans())
def test_round_trips_on_generated_trees(tree, variant, keep_preterminals):
    binary = binarize(tree, *variant)
    assert all(len(node.children) <= 2 for node in binary.subtrees())
    assert binary.leaves() == tree.leaves()
    assert trees_equal(unbinarize(binary), tree)
    collapsed = collapse_unary(tree, keep_preterminals)
    assert trees_equal(expand_unary(collapsed), tree)
    # Both together, in the order a grammar would use them.
    both = binarize(collapse_unary(tree, keep_preterminals), *variant)
    assert trees_equal(expand_unary(unbinarize(both)), tree)


def test_round_trips_on_every_turkish_web_tree():
    path = os.path.join(sysconfig.get_paths()["purelib"], "data", "web.conllu")
    if not os.path.exists(path):
        pytest.skip("turkish-treebanks is not installed")
    corpus = read_corpus(path, options=ReadOptions(nonprojective="lift"))
    assert len(corpus.sentences) == corpus.report.sentences_read
    for sentence in corpus.sentences:
        tree = sentence.tree
        for variant in (("right", None, 1), ("left", 1, 3)):
            assert trees_equal(unbinarize(binarize(tree, *variant)), tree)
        for keep in (True, False):
            assert trees_equal(expand_unary(collapse_unary(tree, keep)), tree)


def test_hand_worked_examples():
    tree = Tree("S", [Tree("NP", [Tree("D", ["the"]), Tree("A", ["old"]), Tree("N", ["ferry"])]),
                      Tree("VP", [Tree("V", ["left"])])])
    # Worked by hand from the definitions in treewright.corpus.transforms.
    assert binarize(tree).to_string() == \
        "(S (NP (D the) (¤NP¤A¤N (A old) (N ferry))) (VP (V left)))"
    assert binarize(tree, "left", horizontal=1, vertical=2).to_string() == \
        "(S (NPˆS (¤NPˆS¤A (D the) (A old)) (N ferry)) (VPˆS (V left)))"
    assert collapse_unary(Tree("S", [tree.children[1]]), keep_preterminals=False).to_string() \
        == "(S¦VP¦V left)"


def test_deep_and_wide_trees_do_not_recurse():
    chain = Tree("A", ["w"])
    for _ in range(4999):
        chain = Tree("A", [chain])
    wide = Tree("S", [Tree("N", [f"w{i}"]) for i in range(3000)])
    assert depth(binarize(wide)) == 3000  # right-factored: one level per child but the last
    assert trees_equal(unbinarize(binarize(wide, "left", 2, 2)), wide)
    assert trees_equal(expand_unary(collapse_unary(chain)), chain)
    assert depth(collapse_unary(chain)) == 2  # the chain joined into one node over the tag


def test_reserved_characters_are_refused():
    with pytest.raises(ValueError, match="reserved"):
        binarize(Tree("A" + PARENT_SEP, [Tree("B", ["x"]), Tree("C", ["y"]), Tree("D", ["z"])]))
    with pytest.raises(ValueError, match="reserved"):
        collapse_unary(Tree("A" + UNARY_SEP + "B", ["x"]))
