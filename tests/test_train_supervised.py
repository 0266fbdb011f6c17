"""Supervised estimation from trees: count(A -> beta) / count(A) against NLTK's induce_pcfg
(reference library, test-only)."""

from __future__ import annotations

import math

import pytest
from nltk import Nonterminal, induce_pcfg
from nltk import Tree as NltkTree
from nltk.grammar import Production

from test_train_fixtures import velmor
from treewright.errors import InputError
from treewright.inference import generate
from treewright.train.supervised import estimate_from_trees
from treewright.trees import Tree


def test_relative_frequencies_equal_nltk_induce_pcfg():
    # Velmor lets NP and VP emit words too (general CNF), so both kinds of rows are checked.
    trees = generate(velmor(), 150, seed=4)
    grammar = estimate_from_trees(trees)
    productions = []
    for tree in trees:
        nltk_tree = NltkTree.fromstring(tree.to_string())
        productions.append(Production(Nonterminal("ROOT"), [Nonterminal(nltk_tree.label())]))
        productions.extend(nltk_tree.productions())
    reference = induce_pcfg(Nonterminal("ROOT"), productions)
    names = grammar.symbols
    index = {n: i for i, n in enumerate(names)}
    nt = len(grammar.nonterminals)
    checked = 0
    for prod in reference.productions():
        lhs = prod.lhs().symbol()
        rhs = prod.rhs()
        if lhs == "ROOT":
            ours = grammar.root[index[rhs[0].symbol()]]
        elif len(rhs) == 2:
            ours = grammar.binary[index[lhs], index[rhs[0].symbol()], index[rhs[1].symbol()]]
        else:
            ours = grammar.lexical[index[lhs], grammar.vocab.index[rhs[0]]]
        assert math.exp(float(ours)) == pytest.approx(prod.prob(), abs=1e-12), prod
        checked += 1
    # Same rule set on both sides: every rule we give positive probability is one NLTK has.
    ours_positive = int((grammar.root > -math.inf).sum() + (grammar.binary > -math.inf).sum()
                        + (grammar.lexical > -math.inf).sum())
    assert ours_positive == checked
    assert nt == 3 and grammar.normalization_error() < 1e-12


def test_trees_outside_normal_form_are_refused_with_their_number():
    unary = Tree("S", [Tree("NP", [Tree("N", ["vesk"])])])
    good = Tree("S", [Tree("N", ["vesk"]), Tree("V", ["sul"])])
    with pytest.raises(InputError, match="line 2.*1 children"):
        estimate_from_trees([good, unary], source="trees.txt")
    assert estimate_from_trees([good]).nonterminals == ["S"]
