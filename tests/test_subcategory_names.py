"""Subcategory names NAME·k: one reading (`grammar.coarse_name`), apart from the corpus
transforms' marks, and kept by the text format, the JSON export, renaming and decoding.

References: the naming rule as the grammar module's docstring and the README define it; the
transforms' exact inverses (`unbinarize(binarize(t)) == t`, common practice for reversible
transforms); round trips of the text and JSON formats (a saved grammar loads back equal)."""

from __future__ import annotations

import math

import pytest
import torch

from treewright.corpus.transforms import BIN_MARK, PARENT_SEP, UNARY_SEP, binarize, unbinarize
from treewright.decode import decode
from treewright.export.jsonformat import grammar_from_json, grammar_to_json
from treewright.export.rename import parse_renaming, check_renaming, rename_grammar
from treewright.grammar import (SUBCATEGORY_MARK, coarse_name, fine_name, parse_grammar,
                                split_name)
from treewright.refine import coarse_name as refine_coarse_name, latent_from_grammar
from treewright.corpus.brackets import parse_brackets
from treewright.trees import Tree

def parse_tree(text: str) -> Tree:
    (tree,) = parse_brackets(text)
    return tree


REFINED = """
@start S
S -> NP·0 VP 1.0
VP -> V NP·1 1.0
NP·0 -> D N 1.0
NP·1 -> D N 0.5
NP·1 -> "ulm" 0.5
D -> "ta" 1.0
N -> "mira" 1.0
V -> "gash" 1.0
"""


@pytest.mark.parametrize("name,coarse,sub", [
    ("NP·1", "NP", 1), ("NP·12", "NP", 12), ("NP", "NP", None), ("NP·x", "NP·x", None),
    ("·1", "·1", None), ("NP·1·2", "NP·1", 2), ("NP@1", "NP@1", None), ("NP-SBJ", "NP-SBJ", None),
])
def test_one_reading_of_subcategory_names(name, coarse, sub):
    # The documented rule: the mark then a number ends a subcategory name; nothing else does.
    assert split_name(name) == (coarse, sub)
    assert coarse_name(name) == coarse
    assert refine_coarse_name(name) == coarse  # refine reads names through the same function
    if sub is not None:
        assert fine_name(coarse, sub) == name


def test_the_mark_differs_from_the_transform_marks_and_survives_them():
    assert SUBCATEGORY_MARK not in (UNARY_SEP, PARENT_SEP, BIN_MARK, "@", "-", "=", "|", "^")
    tree = parse_tree("(S (NP (D ta) (A lum) (N rab)) (V gash))")
    binarized = binarize(tree, horizontal=1, vertical=2)
    # Refine every label, as split-merge does, then read the coarse labels back.
    refined = _map_labels(binarized, lambda label: fine_name(label, 3))
    assert parse_tree(refined.to_string()) == refined  # bracketed text keeps the names
    coarse = _map_labels(refined, coarse_name)
    assert coarse == binarized
    assert unbinarize(coarse) == tree
    marks = [n.label for n in refined.subtrees() if n.label.startswith(BIN_MARK)]
    assert marks and all(split_name(label)[1] == 3 for label in marks)


def _map_labels(tree: Tree, fn) -> Tree:
    out = Tree(fn(tree.label))
    stack = [(tree, out)]
    while stack:
        src, dst = stack.pop()
        for child in src.children:
            if isinstance(child, str):
                dst.children.append(child)
            else:
                copy = Tree(fn(child.label))
                dst.children.append(copy)
                stack.append((child, copy))
    return out


def test_text_and_json_formats_and_renaming_keep_the_names():
    g = parse_grammar(REFINED)
    assert g.nonterminals == ["S", "VP", "NP·0", "NP·1"]
    again = parse_grammar(g.to_text())
    assert again.symbols == g.symbols and again.to_text() == g.to_text()
    export = grammar_from_json(grammar_to_json(g))
    assert export.grammar.to_text() == g.to_text()
    lg = latent_from_grammar(g)
    assert lg.splits[lg.symbols.index("NP")] == 2
    mapping = check_renaming(g, parse_renaming("NP·1  OBJ·0\nNP·0  OBJ·1\n"))
    renamed = rename_grammar(g, mapping)
    assert "OBJ·0" in renamed.nonterminals
    assert torch.equal(renamed.binary, g.binary)
    assert parse_grammar(renamed.to_text()).symbols == renamed.symbols


def test_max_rule_product_projects_onto_coarse_names():
    # Hand-worked: "ta mira gash ulm" has one tree, S(NP·0(D N) VP(V NP·1)); its coarse image
    # has NP in both places and probability 0.5 (the only choice is NP·1 -> "ulm").
    g = parse_grammar(REFINED)
    result = decode(g, [["ta", "mira", "gash", "ulm"]], "max-rule-product")[0]
    assert result.tree == parse_tree("(S (NP (D ta) (N mira)) (VP (V gash) (NP ulm)))")
    assert result.tree_logprob == pytest.approx(math.log(0.5), abs=1e-12)
