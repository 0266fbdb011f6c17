"""Tabular rule parameters: one logit per rule, turned into log-probabilities by a log-softmax
over each left-hand side's rules.

The same object serves EM (which sets the logits to the new log-probabilities, so the softmax
is the identity on them) and gradient training (Adam moves the logits).
"""

from __future__ import annotations

from typing import NamedTuple

import torch
from torch import Tensor, nn

from treewright import engine
from treewright.errors import InputError
from treewright.grammar import Grammar
from treewright.params.base import RuleModel
from treewright.vocab import Vocabulary


class RuleTensors(NamedTuple):
    """Rule log-probabilities (or, for variational Bayes, log-weights) in the induction layout."""
    root: Tensor      # (NT,)
    binary: Tensor    # (NT, S, S)
    lexical: Tensor   # (T, V)

    def dense(self) -> "RuleTensors":
        return self

    def log_partition(self, terminal: Tensor, lengths: Tensor,
                      span_pot: Tensor | None = None) -> Tensor:
        """(B,) log Z for terminal scores (B, N, T), through the dense engine kernel."""
        return engine.log_partition(self.root, self.binary, terminal, lengths, span_pot=span_pot)


def symbol_names(nonterminals: int, preterminals: int) -> tuple[list[str], list[str]]:
    """The names induced symbols get: N0.. for nonterminals, T0.. for preterminals."""
    return [f"N{i}" for i in range(nonterminals)], [f"T{i}" for i in range(preterminals)]


def normalize_rules(root: Tensor, binary: Tensor, lexical: Tensor) -> RuleTensors:
    """Log-softmax per left-hand side: root over NT, each binary row over S*S, each lexical row
    over V. A row of all -inf stays all -inf (never NaN)."""
    nt = binary.shape[0]
    return RuleTensors(_log_softmax(root, 0),
                       _log_softmax(binary.reshape(nt, -1), 1).reshape(binary.shape),
                       _log_softmax(lexical, 1))


def _log_softmax(x: Tensor, dim: int) -> Tensor:
    top = x.amax(dim, keepdim=True)
    dead = ~torch.isfinite(top)
    out = torch.log_softmax(x.masked_fill(dead, 0.0), dim)
    return out.masked_fill(dead, float("-inf"))


class TabularParams(RuleModel):
    """One logit per rule.

    nonterminals, preterminals, vocab_size: NT, T, V.
    init_scale: standard deviation of the normal logits at random initialisation (default 1.0;
        0 gives the uniform grammar).
    generator: the seeded source of that randomness.
    dtype: of the logits (float64 for exactness tests and bit-identical resume).
    """

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int,
                 init_scale: float = 1.0, generator: torch.Generator | None = None,
                 dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals

        def draw(*shape: int) -> Tensor:
            return (torch.randn(*shape, generator=generator, dtype=torch.float64)
                    * init_scale).to(dtype)

        self.root_logits = nn.Parameter(draw(nonterminals))                 # (NT,)
        self.binary_logits = nn.Parameter(draw(nonterminals, s, s))          # (NT, S, S)
        self.lexical_logits = nn.Parameter(draw(preterminals, vocab_size))   # (T, V)

    @property
    def sizes(self) -> tuple[int, int, int]:
        """(NT, T, V)."""
        return (self.root_logits.shape[0], self.lexical_logits.shape[0],
                self.lexical_logits.shape[1])

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "TabularParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.init_scale,
                   generator, dtype)

    def rules(self) -> RuleTensors:
        return normalize_rules(self.root_logits, self.binary_logits, self.lexical_logits)

    @torch.no_grad()
    def set_log_probs(self, rules: RuleTensors) -> None:
        """Store normalized log-probabilities (the M-step of EM) as the logits."""
        self.root_logits.copy_(rules.root)
        self.binary_logits.copy_(rules.binary)
        self.lexical_logits.copy_(rules.lexical)

    def to_grammar(self, nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                   start: str = "ROOT") -> Grammar:
        return rules_to_grammar(self.rules(), nonterminals, preterminals, vocab, start)


def _renormalize(rows: torch.Tensor) -> torch.Tensor:
    """Log-probability rows rescaled to sum to one; a row with no finite entry stays as it is."""
    alive = torch.isfinite(rows).any(1, keepdim=True)
    return torch.where(alive, rows.log_softmax(1), rows)


def keep_most_probable(binary: torch.Tensor, per_symbol: int
                       ) -> tuple[torch.Tensor, torch.Tensor]:
    """binary (NT, S, S) log-probabilities with all but each nonterminal's `per_symbol` most
    probable rules set to -inf (ties: the first in row-major order of (B, C)), and the
    probability mass (NT,) float64 that this leaves out. Renormalising is left to the caller
    (`rules_to_grammar` does it)."""
    nt = binary.shape[0]
    flat = binary.detach().reshape(nt, -1)
    total = flat.double().logsumexp(1).exp()
    if per_symbol >= flat.shape[1]:
        return binary, torch.zeros(nt, dtype=torch.float64)
    top = flat.topk(per_symbol, dim=1, sorted=False)
    kept = torch.full_like(flat, float("-inf")).scatter_(1, top.indices, top.values)
    removed = (total - top.values.double().exp().sum(1)).clamp(min=0.0)
    return kept.view_as(binary), removed


def rules_to_grammar(rules: RuleTensors, nonterminals: list[str], preterminals: list[str],
                     vocab: Vocabulary, start: str = "ROOT") -> Grammar:
    """A `Grammar` (detached float64 copies) from induction-layout rules.

    Each distribution is renormalised in float64: rules computed in float32 sum to one only to
    about 1e-6, and a saved grammar must load back under the format's sum-to-one check."""
    nt = len(nonterminals)
    root, binary, lexical = (x.detach().double() for x in rules)
    root = _renormalize(root[None])[0]
    binary = _renormalize(binary.flatten(1)).view_as(binary)
    lexical = _renormalize(lexical)
    full_lexical = torch.cat([lexical.new_full((nt, lexical.shape[1]), float("-inf")), lexical])
    return Grammar(list(nonterminals), list(preterminals), vocab, root, binary, full_lexical,
                   start)


def tabular_from_grammar(grammar: Grammar, vocab: Vocabulary, mix: float = 0.0,
                         dtype: torch.dtype = torch.float64, source: str | None = None
                         ) -> TabularParams:
    """A warm start: tabular parameters holding a hand-written grammar's rules, re-indexed to the
    training vocabulary `vocab`.

    mix: weight in [0, 1) of the uniform distribution mixed into every rule distribution,
        p = (1 - mix) p_grammar + mix * uniform. With 0 (the default) rules the grammar leaves
        out keep probability zero, which EM never changes; training words the grammar has no
        rule for then make their sentences unparseable (they are counted, not dropped).
    Raises InputError when the grammar lets nonterminals emit words (training uses the
    induction layout), naming `source`.
    """
    if grammar.nonterminals_emit:
        raise InputError("a warm-start grammar must keep words under preterminals only (its "
                         "nonterminals emit words, which training does not support)", path=source)
    nt, t, v = len(grammar.nonterminals), len(grammar.preterminals), len(vocab)
    params = TabularParams(nt, t, v, init_scale=0.0, dtype=dtype)
    lexical = torch.full((t, v), float("-inf"), dtype=torch.float64)
    source_lexical = grammar.lexical.double()[nt:]                      # (T, V_grammar)
    for word, w in vocab.index.items():
        g = grammar.vocab.index.get(word)
        if g is not None:
            lexical[:, w] = source_lexical[:, g]
    rules = normalize_rules(grammar.root.double(), grammar.binary.double(), lexical)
    if mix > 0:
        rules = RuleTensors(*(_mix_uniform(x, mix) for x in
                              (rules.root[None], rules.binary.reshape(nt, -1), rules.lexical)))
        rules = RuleTensors(rules.root[0], rules.binary.reshape(grammar.binary.shape),
                            rules.lexical)
    params.set_log_probs(RuleTensors(*(x.to(dtype) for x in rules)))
    return params


def _mix_uniform(rows: Tensor, mix: float) -> Tensor:
    """log((1 - mix) p + mix / K) per row of log-probabilities (R, K)."""
    k = rows.shape[1]
    return torch.logaddexp(rows + torch.log1p(torch.tensor(-mix, dtype=rows.dtype)),
                           torch.full_like(rows, torch.log(torch.tensor(mix / k)).item()))
