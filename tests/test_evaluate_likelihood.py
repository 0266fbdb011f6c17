"""Held-out log-likelihood per word and perplexity."""

from __future__ import annotations

import json
import math

import pytest

from treewright.errors import InputError
from treewright.evaluation import heldout_likelihood


def test_uniform_model_has_perplexity_of_its_vocabulary():
    # A fact of the trade: a model giving each of V words probability 1/V, independently, has
    # perplexity exactly V, whatever the sentence lengths.
    vocabulary = 37
    lengths = [3, 8, 1, 12]
    scores = heldout_likelihood([-n * math.log(vocabulary) for n in lengths], lengths)
    assert scores.perplexity == pytest.approx(vocabulary)
    assert scores.logprob_per_word == pytest.approx(-math.log(vocabulary))
    assert (scores.total_words, scores.sentences) == (24, 4)


def test_hand_example_pools_over_words_not_sentences():
    # By hand: log-probabilities -2 (2 words) and -10 (8 words) give -12 / 10 = -1.2 per word
    # (a mean over sentences of per-word values would give (-1 + -1.25) / 2 = -1.125 instead).
    scores = heldout_likelihood([-2.0, -10.0], [2, 8])
    assert scores.logprob_per_word == pytest.approx(-1.2)
    assert scores.perplexity == pytest.approx(math.exp(1.2))
    assert "no end-of-sentence event" in scores.to_dict()["conventions"]["words"]


def test_zero_probability_sentence():
    scores = heldout_likelihood([-1.0, -math.inf], [1, 2])
    assert scores.perplexity == math.inf and scores.zero_probability_sentences == 1
    assert json.loads(json.dumps(scores.to_dict()))["perplexity"] == "inf"


@pytest.mark.parametrize("logprobs, counts, line", [
    ([-1.0], [1, 2], 2),           # different lengths: first sentence missing on one side
    ([-1.0, 0.5], [1, 2], 2),      # a probability above one
    ([-1.0, float("nan")], [1, 1], 2),
    ([-1.0, -1.0], [1, 0], 2),     # a PCFG gives no empty sentence
])
def test_bad_input_names_the_sentence(logprobs, counts, line):
    with pytest.raises(InputError) as err:
        heldout_likelihood(logprobs, counts, path="scores.tsv")
    assert err.value.line == line and f"scores.tsv, line {line}" in str(err.value)


def test_perplexity_is_infinite_where_the_exponential_overflows():
    # Common practice: perplexity = exp(-log-likelihood per word); a diverged model (below
    # about -709 nats a word, where exp overflows a float) gets inf, not an OverflowError.
    from treewright.evaluation import perplexity
    assert perplexity(-2.0) == pytest.approx(math.exp(2.0), rel=1e-15)
    assert perplexity(-708.0) == pytest.approx(math.exp(708.0), rel=1e-12)
    assert perplexity(-800.0) == math.inf and perplexity(-math.inf) == math.inf
    scores = heldout_likelihood([-8000.0, -8000.0], [10, 10])
    assert scores.perplexity == math.inf and scores.logprob_per_word == -800.0
