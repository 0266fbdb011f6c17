"""Parameterizations: normalized rules, a warm start that reproduces its grammar, the neural
PCFG's shapes and gradients, seeded initialisation."""

from __future__ import annotations

import pytest
import torch

from test_train_fixtures import velmor
from treewright.errors import InputError
from treewright.grammar import parse_grammar
from treewright.params import NeuralParams, TabularParams, tabular_from_grammar
from treewright.vocab import Vocabulary

# An induction-layout grammar of the invented language (words only under preterminals).
HAND = """@start ROOT
ROOT -> S 1.0
S -> D N 0.25
S -> S V 0.75
D -> "ta" 1.0
N -> "ferro" 0.5
N -> "lanu" 0.5
V -> "orun" 1.0
"""


def _row_sums(rules):
    return (rules.root.logsumexp(0), rules.binary.flatten(1).logsumexp(1),
            rules.lexical.logsumexp(1))


@pytest.mark.parametrize("make", [
    lambda g: TabularParams(3, 4, 7, 1.0, g, torch.float64),
    lambda g: NeuralParams(3, 4, 7, dim=8, blocks=2, generator=g, dtype=torch.float64),
], ids=["tabular", "neural"])
def test_every_rule_distribution_sums_to_one(make):
    # Fact of the trade: a PCFG's rules of each left-hand side form a distribution.
    rules = make(torch.Generator().manual_seed(0)).rules()
    assert rules.root.shape == (3,) and rules.binary.shape == (3, 7, 7)
    assert rules.lexical.shape == (4, 7)
    for sums in _row_sums(rules):
        torch.testing.assert_close(sums, torch.zeros_like(sums), atol=1e-12, rtol=0)


def test_seeded_initialisation_repeats_and_differs_across_seeds():
    a = NeuralParams(2, 3, 5, dim=4, generator=torch.Generator().manual_seed(7)).rules()
    b = NeuralParams(2, 3, 5, dim=4, generator=torch.Generator().manual_seed(7)).rules()
    c = NeuralParams(2, 3, 5, dim=4, generator=torch.Generator().manual_seed(8)).rules()
    assert torch.equal(a.binary, b.binary) and not torch.equal(a.binary, c.binary)


def test_neural_gradient_reaches_every_parameter():
    model = NeuralParams(2, 3, 5, dim=4, generator=torch.Generator().manual_seed(0))
    rules = model.rules()
    (rules.root[0] + rules.binary[1, 2, 3] + rules.lexical[2, 4]).backward()
    assert all(p.grad is not None and bool(p.grad.abs().sum() > 0)
               for name, p in model.named_parameters() if "bias" not in name)


def test_warm_start_reproduces_the_hand_written_grammar():
    # Reference: the grammar file's own probabilities.
    grammar = parse_grammar(HAND)
    params = tabular_from_grammar(grammar, grammar.vocab)
    back = params.to_grammar(grammar.nonterminals, grammar.preterminals, grammar.vocab)
    torch.testing.assert_close(back.binary, grammar.binary)
    torch.testing.assert_close(back.lexical, grammar.lexical)
    torch.testing.assert_close(back.root, grammar.root)
    assert back.nonterminals == grammar.nonterminals and back.start == grammar.start


def test_warm_start_mixing_and_new_words():
    grammar = parse_grammar(HAND)
    vocab = Vocabulary(["ferro", "ta", "vesk", "orun", "lanu", "<unk>"])
    kept = tabular_from_grammar(grammar, vocab).rules()
    n = vocab.index
    # Without mixing, words the grammar never emits keep probability zero.
    assert float(kept.lexical[:, n["vesk"]].detach().exp().sum()) == 0.0
    mixed = tabular_from_grammar(grammar, vocab, mix=0.1).rules()
    # p = 0.9 * p_grammar + 0.1 / V, by hand for N -> "ferro" (0.5) and N -> "vesk" (0).
    t_n = grammar.preterminals.index("N")
    lexical = mixed.lexical.detach()   # trainable parameters; only their values matter here
    assert float(lexical[t_n, n["ferro"]].exp()) == pytest.approx(0.9 * 0.5 + 0.1 / 6)
    assert float(lexical[t_n, n["vesk"]].exp()) == pytest.approx(0.1 / 6)


def test_warm_start_refuses_nonterminals_that_emit_words():
    with pytest.raises(InputError, match="preterminals only"):
        tabular_from_grammar(velmor(), velmor().vocab, source="velmor.pcfg")
