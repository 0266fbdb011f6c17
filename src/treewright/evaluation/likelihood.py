"""Held-out log-likelihood per word and perplexity from per-sentence log-probabilities."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Sequence

from treewright.errors import InputError
from treewright.tracking import perplexity

# Sentence log-probabilities a little above 0 are rounding in a nearly deterministic grammar.
LOGPROB_SLACK = 1e-6


@dataclass(frozen=True)
class LikelihoodScores:
    """Totals and per-word scores; natural log. perplexity = exp(-total_logprob / total_words).

    Words are the sentence's tokens only: no end-of-sentence event is counted, since a PCFG
    generates none. A sentence of probability zero makes the totals -inf and perplexity inf.
    """

    total_logprob: float
    total_words: int
    sentences: int
    zero_probability_sentences: int
    logprob_per_word: float
    perplexity: float

    def to_dict(self) -> dict:
        """JSON-able; an infinite value is written as the string "inf" or "-inf"."""
        out = {k: (str(v) if isinstance(v, float) and math.isinf(v) else v) for k, v in asdict(self).items()}
        out["conventions"] = {
            "log": "natural",
            "words": "tokens only; no end-of-sentence event is counted (a PCFG has none)",
            "perplexity": "exp(-total_logprob / total_words)",
        }
        return out


def heldout_likelihood(logprobs: Sequence[float], word_counts: Sequence[int], *,
                       path: str | None = None) -> LikelihoodScores:
    """Pool per-sentence log-probabilities (natural log, shape (S,)) over word counts (shape (S,)).

    Raises InputError naming the first bad sentence (1-based): counts that differ in length, a
    word count below 1, a log-probability that is NaN or above 0 (beyond `LOGPROB_SLACK`).
    """
    if len(logprobs) != len(word_counts):
        first = min(len(logprobs), len(word_counts)) + 1
        raise InputError(f"sentence {first}: {len(logprobs)} log-probabilities for {len(word_counts)} word counts",
                         path=path, line=first)
    if not logprobs:
        raise InputError("no sentences to score", path=path)
    for index, (lp, words) in enumerate(zip(logprobs, word_counts)):
        if int(words) != words or words < 1:
            raise InputError(f"sentence {index + 1}: word count {words} is not a positive integer",
                             path=path, line=index + 1)
        if math.isnan(lp) or lp > LOGPROB_SLACK:
            raise InputError(f"sentence {index + 1}: log-probability {lp} is not a log of a probability",
                             path=path, line=index + 1)
    total = math.fsum(min(float(lp), 0.0) for lp in logprobs)
    words = int(sum(word_counts))
    per_word = total / words
    return LikelihoodScores(total_logprob=total, total_words=words, sentences=len(logprobs),
                            zero_probability_sentences=sum(lp == -math.inf for lp in logprobs),
                            logprob_per_word=per_word, perplexity=perplexity(per_word))
