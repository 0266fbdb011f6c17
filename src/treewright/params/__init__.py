"""Parameterizations: ways of turning learnable parameters into rule log-probabilities.

Every parameterization is a `torch.nn.Module` with
- `rules() -> (root (NT,), binary (NT, S, S), lexical (T, V))`, normalized log-probabilities in
  the induction layout (nonterminals rewrite only to two children, preterminals only to words;
  children are nonterminals first, then preterminals), and
- `to_grammar(nonterminals, preterminals, vocab, start)`, the current rules as a `Grammar`.

`tabular.TabularParams` holds one logit per rule (EM writes log-probabilities into it directly);
`neural.NeuralParams` computes the rules from symbol embeddings (Kim, Dyer & Rush 2019);
`lowrank.LowRankParams` computes low-rank factors of the binary rules (Yang, Zhao & Tu 2021) and
returns `LowRankRules`, whose dense `binary` is formed only on request; `compound.CompoundParams`
(Kim, Dyer & Rush 2019) gives every sentence its own rules through a latent vector, and its
`rules()` is the grammar at the prior's mean.
"""

from treewright.params.tabular import (RuleTensors, TabularParams, symbol_names,
                                       tabular_from_grammar)
from treewright.params.neural import NeuralParams
from treewright.params.lowrank import LowRankParams, LowRankRules
from treewright.params.compound import CompoundParams, CompoundRules

__all__ = ["CompoundParams", "CompoundRules", "LowRankParams", "LowRankRules", "NeuralParams",
           "RuleTensors", "TabularParams", "symbol_names", "tabular_from_grammar"]
