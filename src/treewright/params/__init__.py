"""Parameterizations: ways of turning learnable parameters into rule log-probabilities.

Every parameterization is a `base.RuleModel` (a `torch.nn.Module`) with
- `rules() -> (root (NT,), binary (NT, S, S), lexical (T, V))`, normalized log-probabilities in
  the induction layout (nonterminals rewrite only to two children, preterminals only to words;
  children are nonterminals first, then preterminals),
- `log_partition(ids, lengths, span_pot, generator)`: log Z of a batch with gradient (and the
  KL term of a latent-variable model), and `scorer(rules)`: log Z and span posteriors for dev
  scores, so that the training loop never asks which parameterization it holds,
- `from_options(model_options, vocab_size, generator, dtype)`, and
- `to_grammar(nonterminals, preterminals, vocab, start)`, the current rules as a `Grammar`.

`PARAMETERIZATIONS` maps the config's `model.parameterization` names to the classes; a new
parameterization is one module here and one line there.

`tabular.TabularParams` holds one logit per rule (EM writes log-probabilities into it directly);
`neural.NeuralParams` computes the rules from symbol embeddings (Kim, Dyer & Rush 2019);
`lowrank.LowRankParams` computes low-rank factors of the binary rules (Yang, Zhao & Tu 2021) and
returns `LowRankRules`, whose dense `binary` is formed only on request; `compound.CompoundParams`
(Kim, Dyer & Rush 2019) gives every sentence its own rules through a latent vector, and its
`rules()` is the grammar at the prior's mean; `independent.IndependentParams` (Liu, Yang, Kim & Tu 2023) gives each nonterminal independent
left- and right-child distributions and returns `IndependentRules`, run by
`engine.independent`, and `independent.NeuralIndependentParams` computes the same factors from
symbol embeddings; `lexicalized.LexicalizedParams` (Yang, Zhao & Tu
2021) gives every constituent a head word and scores each sentence through
`engine.lexicalized`, and its `rules()` is its symbol-only back-off grammar.
"""

from treewright.params.base import RuleModel, Scorer
from treewright.params.tabular import (RuleTensors, TabularParams, symbol_names,
                                       tabular_from_grammar)
from treewright.params.neural import NeuralParams
from treewright.params.lowrank import LowRankParams, LowRankRules
from treewright.params.compound import CompoundParams, CompoundRules
from treewright.params.independent import (IndependentParams, IndependentRules,
                                           NeuralIndependentParams)
from treewright.params.lexicalized import LexicalizedParams

PARAMETERIZATIONS: dict[str, type[RuleModel]] = {
    "tabular": TabularParams, "neural": NeuralParams, "lowrank": LowRankParams,
    "compound": CompoundParams, "lexicalized": LexicalizedParams,
    "independent": IndependentParams, "independent-neural": NeuralIndependentParams}

__all__ = ["PARAMETERIZATIONS", "CompoundParams", "CompoundRules", "IndependentParams",
           "IndependentRules", "LexicalizedParams",
           "LowRankParams", "LowRankRules", "NeuralIndependentParams", "NeuralParams",
           "RuleModel", "RuleTensors", "Scorer",
           "TabularParams", "symbol_names", "tabular_from_grammar"]
