"""One grammar builder (`grammar.build_grammar`) behind the text format, the JSON export and the
relative-frequency estimate: the three give the same bits for the same rules.

References: relative frequencies counted by hand (the maximum-likelihood estimate from observed
trees, a fact of the trade), and the formats' round trips."""

from __future__ import annotations

import pytest
import torch

from treewright.corpus.brackets import parse_brackets
from treewright.errors import InputError
from treewright.export.jsonformat import grammar_from_json, grammar_to_json
from treewright.grammar import build_grammar, parse_grammar
from treewright.train.supervised import estimate_from_trees
from treewright.vocab import Vocabulary

TREES = "(S (A a) (B b))\n(S (A a) (S (A c) (B b)))\n(T (B b) (A a))\n"


def _rules(g) -> dict:
    """Every rule of positive probability by name, with its exact float64 log-probability
    (the vocabulary's order may differ between formats; the rules may not)."""
    names, words = g.symbols, g.vocab.words
    out = {("root", names[a]): float(g.root[a]) for a in range(len(g.nonterminals))}
    for a, b, c in torch.isfinite(g.binary).nonzero().tolist():
        out[(names[a], names[b], names[c])] = float(g.binary[a, b, c])
    for x, w in torch.isfinite(g.lexical).nonzero().tolist():
        out[(names[x], words[w])] = float(g.lexical[x, w])
    return out


def _same(g, h) -> None:
    assert g.symbols == h.symbols and g.start == h.start
    assert g.binary.dtype == h.binary.dtype == torch.float64
    assert _rules(g) == _rules(h)  # exact equality of every float64


def test_estimate_text_and_json_agree_bit_for_bit():
    g = estimate_from_trees(parse_brackets(TREES))
    # Hand count: S -> A B twice and S -> A S once, T -> B A once; A emits a three times and c
    # once; the tops are S twice and T once.
    names = g.symbols
    S, T, A, B = (names.index(x) for x in "STAB")
    assert float(g.binary[S, A, B].exp()) == pytest.approx(2 / 3, abs=1e-15)
    assert float(g.binary[S, A, S].exp()) == pytest.approx(1 / 3, abs=1e-15)
    assert float(g.binary[T, B, A].exp()) == 1.0
    assert float(g.lexical[A, g.vocab.index["a"]].exp()) == pytest.approx(3 / 4, abs=1e-15)
    assert float(g.root[S].exp()) == pytest.approx(2 / 3, abs=1e-15)
    _same(parse_grammar(g.to_text()), g)
    _same(grammar_from_json(grammar_to_json(g)).grammar, g)


def test_builder_checks_or_rescales_each_left_hand_side():
    vocab = Vocabulary(["x"], unk=None)
    rules = dict(root={}, binary={("S", "S", "S"): 0.3}, lexical={("S", "x"): 0.6})
    with pytest.raises(InputError, match="the rules of S sum to 0.89999"):
        build_grammar(["S"], [], vocab, "S", **rules)
    g = build_grammar(["S"], [], vocab, "S", **rules, rescale=True)
    # 0.3 / 0.9 and 0.6 / 0.9, each rounded once (IEEE division).
    assert float(g.binary[0, 0, 0].exp()) == pytest.approx(1 / 3, rel=1e-15)
    assert float(g.lexical[0, 0].exp()) == pytest.approx(2 / 3, rel=1e-15)
    assert float(g.root[0]) == 0.0  # the start symbol is the top with probability one
    with pytest.raises(ValueError, match="mine"):
        build_grammar(["S"], [], vocab, "S", **rules,
                      bad_total=lambda name, total: ValueError(f"mine: {name} {total}"))
