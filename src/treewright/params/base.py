"""The model interface the training loop and the dev evaluator see: log Z of a batch and span
posteriors, whatever the parameterization.

Every parameterization is a `RuleModel`:
- `rules()`: the current rules (normalized log-probabilities; `RuleTensors`, or factored
  `LowRankRules`), with gradient to the parameters;
- `log_partition(ids, lengths, span_pot, generator)`: (B,) log p(x_b) with gradient, and the
  (B,) KL term of a latent-variable model (None for the others);
- `scorer(rules)`: a `Scorer` for dev scores (no gradient), of `rules` when the training method
  reports other rules than `rules()` (variational Bayes: the posterior mean), else of the model;
- `from_options(options, vocab_size, generator, dtype)`: built from the model section of a
  training config (read by attribute, so this layer does not import the config).

The rules tuples carry their own engine call (`RuleTensors.log_partition`,
`LowRankRules.log_partition`), so nothing here tells dense rules from factored ones.
"""

from __future__ import annotations

from typing import Any, Protocol

import torch
from torch import Tensor, nn

from treewright.inference import encode_ids


def span_posteriors(rules: Any, terminal: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
    """log Z (B,) and the posterior span marginals (B, N+1, N+1), [b, start, width], as the
    gradient of log Z with respect to a zero span potential (Eisner 2016)."""
    B, N, _ = terminal.shape
    pot = terminal.new_zeros(B, N + 1, N + 1, requires_grad=True)
    with torch.enable_grad():
        detached = type(rules)(*(x.detach() for x in rules))
        logz = detached.log_partition(terminal.detach(), lengths, span_pot=pot)
        ok = torch.isfinite(logz)
        (spans,) = torch.autograd.grad(torch.where(ok, logz, torch.zeros_like(logz)).sum(), pot)
    return logz.detach(), spans


class Scorer(Protocol):
    """What a dev evaluator asks of the grammar as it stands (no gradient)."""

    def log_likelihood(self, ids: Tensor, lengths: Tensor) -> Tensor:
        """(B,) log p(x_b) (-inf: no parse)."""

    def span_posteriors(self, ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        """(B,) log p(x_b) and span marginals (B, N+1, N+1) [b, start, width]."""


class RulesScorer:
    """The `Scorer` of one set of rules shared by every sentence."""

    def __init__(self, rules: Any):
        self.rules = rules

    def log_likelihood(self, ids: Tensor, lengths: Tensor) -> Tensor:
        with torch.no_grad():
            terminal = encode_ids(self.rules.lexical, ids, lengths).terminal    # (B, N, T)
            return self.rules.log_partition(terminal, lengths)

    def span_posteriors(self, ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        return span_posteriors(self.rules, encode_ids(self.rules.lexical, ids, lengths).terminal,
                               lengths)


class RuleModel(nn.Module):
    """Base of every parameterization (see the module docstring)."""

    # Whether the model gives a one-word sentence any tree. The induction layout does not: the
    # root rewrites to a nonterminal, and every nonterminal to two children, so each tree
    # covers two or more words. Training sets one-word sentences aside when this is False.
    parses_one_word: bool = False

    def rules(self) -> Any:
        raise NotImplementedError

    @staticmethod
    def memory_shape(options) -> dict:
        """Keyword arguments of `engine.memory.inside_outside_bytes` beyond the sizes: none
        for dense rules shared by every sentence."""
        return {}

    def log_partition(self, ids: Tensor, lengths: Tensor, span_pot: Tensor | None = None,
                      generator: torch.Generator | None = None) -> tuple[Tensor, Tensor | None]:
        """(B,) log Z of the sentences `ids` (B, N) under the current rules, with gradient;
        no KL term. `generator` is for models that sample (unused here)."""
        rules = self.rules()
        terminal = encode_ids(rules.lexical, ids, lengths).terminal            # (B, N, T)
        return rules.log_partition(terminal, lengths, span_pot=span_pot), None

    def snapshot(self) -> Any:
        """The current rules without gradient."""
        with torch.no_grad():
            rules = self.rules()
            return type(rules)(*(x.detach() for x in rules))

    def scorer(self, rules: Any = None) -> Scorer:
        return RulesScorer(self.snapshot() if rules is None else rules)
