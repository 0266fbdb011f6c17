"""Numbers reported during training: rule entropies and the unigram baseline."""

from __future__ import annotations

import math
from collections import Counter
from typing import Sequence

import torch

from treewright.params.tabular import RuleTensors


def _entropy_rows(logp: torch.Tensor) -> torch.Tensor:
    """(R,) entropy in nats of each row of log-probabilities (R, K); 0 log 0 = 0."""
    p = logp.exp()
    return -(p * logp.masked_fill(p == 0, 0.0)).sum(1)


def rule_entropies(rules: RuleTensors, nonterminals: Sequence[str],
                   preterminals: Sequence[str]) -> dict[str, float]:
    """Entropy (nats) of every symbol's rule distribution, with mean and max per kind:
    `entropy/root`, `entropy/binary_mean`, `entropy/binary_max`, `entropy/lexical_mean`,
    `entropy/lexical_max`, and `entropy/binary/<symbol>`, `entropy/lexical/<symbol>`. `rules`
    has `root`, `binary` and `lexical` log-probabilities; independent productions (`left`,
    `right`: `params.IndependentRules`) are read from their two factors, never forming the
    (NT, S, S) tensor: the entropy of p(B | A, left) p(C | A, right) is the sum of the two."""
    with torch.no_grad():
        root = _entropy_rows(rules.root.double()[None])[0]
        if hasattr(rules, "left") and hasattr(rules, "right"):
            binary = _entropy_rows(rules.left.double()) + _entropy_rows(rules.right.double())
        else:
            binary = _entropy_rows(rules.binary.double().flatten(1))
        lexical = _entropy_rows(rules.lexical.double())
    out = {"entropy/root": float(root),
           "entropy/binary_mean": float(binary.mean()), "entropy/binary_max": float(binary.max()),
           "entropy/lexical_mean": float(lexical.mean()),
           "entropy/lexical_max": float(lexical.max())}
    out.update({f"entropy/binary/{name}": float(h) for name, h in zip(nonterminals, binary)})
    out.update({f"entropy/lexical/{name}": float(h) for name, h in zip(preterminals, lexical)})
    return out


def unigram_logprobs(train_ids: Sequence[Sequence[int]], eval_ids: Sequence[Sequence[int]],
                     vocab_size: int) -> list[float]:
    """Per-sentence log-probability under an add-one (Laplace) unigram model estimated on
    `train_ids` over `vocab_size` word types and an end-of-sentence event, counted once per
    training sentence (common practice as the baseline an induced grammar has to beat).

    The end event makes it a distribution over sentences of every length, as a PCFG's p(sentence)
    is: without it the unigram never pays for a sentence's length and reads better per word than
    any grammar could show (0.27 nats per word on Turkish web; docs/induction_notes.md)."""
    counts = Counter(w for s in train_ids for w in s)
    ends = len(train_ids)
    total = sum(counts.values()) + ends + vocab_size + 1      # add one to every word and to end
    log_end = math.log((ends + 1) / total)
    return [sum(math.log((counts[w] + 1) / total) for w in s) + log_end for s in eval_ids]
