"""One sentence-to-engine path (`inference.encode_ids`, with `pad_ids` and `encode`).

Reference: the definition of the terminal scores, score[b, k, X] = log p(X -> word at k), read
off the lexical table entry by entry."""

from __future__ import annotations

import math

import torch

from _grammars import random_grammar
from treewright.inference import encode, encode_ids, pad_ids, score


def test_scores_are_the_lexical_rules_of_each_word():
    g = random_grammar(2, 3, 4, seed=3, nt_emit=True)
    sentences = [["w1", "w3", "w0"], ["w2"], ["w0", "zz"]]
    enc = encode(g, sentences, torch.float64)
    assert enc.unknown == [[], [], ["zz"]]
    for b, words in enumerate(sentences):
        for k, word in enumerate(words):
            if word == "zz":  # no rule emits it: every score is -inf (no parse)
                assert bool((enc.terminal[b, k] == -math.inf).all())
                assert bool((enc.nt_terminal[b, k] == -math.inf).all())
                assert not bool(enc.known[b, k])
                continue
            w = g.vocab.index[word]
            assert torch.equal(enc.terminal[b, k], g.lexical[2:, w])
            assert torch.equal(enc.nt_terminal[b, k], g.lexical[:2, w])
            assert int(enc.ids[b, k]) == w and bool(enc.known[b, k])
    assert enc.lengths.tolist() == [3, 1, 2]
    assert not bool(enc.known[1, 1:].any())  # padding is not a word
    assert score(g, sentences[2:], dtype=torch.float64)[0].logprob == -math.inf


def test_word_ids_padded_and_the_preterminal_only_layout():
    # By hand: ids padded with 0 past each length; -1 (no entry) gives -inf everywhere; with
    # num_nt = 0 the rows are preterminals only, as the induction layout's (T, V) tables are.
    g = random_grammar(2, 3, 5, seed=4, nt_emit=True)
    ids = [[1, 4, 0, 2], [3, 3], [0, -1, 2]]
    table, lengths = pad_ids(ids)
    assert table.tolist() == [[1, 4, 0, 2], [3, 3, 0, 0], [0, -1, 2, 0]]
    assert lengths.tolist() == [4, 2, 3]
    enc = encode_ids(g.lexical, table, lengths, 2)
    assert enc.ids.tolist() == [[1, 4, 0, 2], [3, 3, 0, 0], [0, 0, 2, 0]]
    assert enc.known.tolist() == [[True] * 4, [True, True, False, False],
                                  [True, False, True, False]]
    for b, row in enumerate(ids):
        for k, w in enumerate(row):
            want = g.lexical[:, w] if w >= 0 else torch.full((5,), -math.inf, dtype=torch.float64)
            assert torch.equal(enc.nt_terminal[b, k], want[:2])
            assert torch.equal(enc.terminal[b, k], want[2:])
    pre = encode_ids(g.lexical[2:], table, lengths)
    assert pre.nt_terminal is None and torch.equal(pre.terminal, enc.terminal)


def test_scores_keep_the_gradient_of_the_lexical_rules():
    # Gradient training gathers its terminal scores through the same function.
    lexical = torch.randn(3, 4, dtype=torch.float64, requires_grad=True)
    table, lengths = pad_ids([[0, 1, 1], [3]])
    enc = encode_ids(lexical, table, lengths)
    enc.terminal[0].sum().backward()
    # d/d lexical[x, w] of the sum over sentence 0's three words: how often w occurs there.
    expect = torch.tensor([1.0, 2.0, 0.0, 0.0], dtype=torch.float64).expand(3, 4)
    assert torch.equal(lexical.grad, expect)
