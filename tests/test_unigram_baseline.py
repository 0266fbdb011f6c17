"""The unigram dev baseline: an add-one model of words and an end-of-sentence event, so that it
is a distribution over sentences of every length, as a PCFG's p(sentence) is."""

from __future__ import annotations

import itertools
import math

import pytest

from treewright.train.metrics import unigram_logprobs


def test_a_small_case_by_hand():
    # Training [a b] [b]; vocabulary {a, b, c}. Counts a 1, b 2, c 0, end 2 (one per sentence);
    # add one to each of the four outcomes: total 3 + 2 + 4 = 9 (worked by hand).
    (lp,) = unigram_logprobs([[0, 1], [1]], [[1, 2]], 3)
    assert lp == pytest.approx(math.log(3 / 9) + math.log(1 / 9) + math.log(3 / 9), rel=1e-12)


def test_probabilities_of_all_sentences_sum_to_one():
    # Enumeration of every sentence of up to K words over three words: a distribution over
    # sentences of every length puts 1 - (1 - p_end)^(K+1) on them, with p_end the empty
    # sentence's probability (geometric lengths; a fact of probability).
    train = [[0, 1, 1], [2], [1, 0]]
    k_max = 6
    sentences = [list(s) for n in range(k_max + 1) for s in itertools.product(range(3), repeat=n)]
    total = sum(math.exp(lp) for lp in unigram_logprobs(train, sentences, 3))
    p_end = math.exp(unigram_logprobs(train, [[]], 3)[0])
    assert 0 < p_end < 1
    assert total == pytest.approx(1 - (1 - p_end) ** (k_max + 1), rel=1e-12)
