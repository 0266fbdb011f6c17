"""The neural PCFG parameterization of Kim, Dyer & Rush (2019), "Compound Probabilistic
Context-Free Grammars for Grammar Induction" (section 2, the non-compound model).

Each symbol has an embedding. The root distribution is a residual MLP of a start embedding, the
binary rules of A are a linear map of A's embedding to scores over all child pairs, and the words
of preterminal T are a residual MLP of T's embedding followed by a linear map to the vocabulary.
Sharing the embeddings and networks ties the rule distributions together, which is what the paper
credits for better grammars than tabular parameters trained the same way.
"""

from __future__ import annotations

import torch
from torch import Tensor, nn

from treewright.grammar import Grammar
from treewright.params.base import RuleModel
from treewright.params.tabular import RuleTensors, rules_to_grammar
from treewright.vocab import Vocabulary


class ResidualBlock(nn.Module):
    """x + relu(W2 relu(W1 x)), the residual layer of Kim et al. (2019)."""

    def __init__(self, dim: int):
        super().__init__()
        self.first = nn.Linear(dim, dim)
        self.second = nn.Linear(dim, dim)

    def forward(self, x: Tensor) -> Tensor:
        return x + torch.relu(self.second(torch.relu(self.first(x))))


def mlp(dim: int, blocks: int, out: int, hidden: int | None = None) -> nn.Sequential:
    """Linear(dim -> hidden), `blocks` residual blocks, Linear(hidden -> out); hidden = dim
    unless given."""
    hidden = dim if hidden is None else hidden
    return nn.Sequential(nn.Linear(dim, hidden), *[ResidualBlock(hidden) for _ in range(blocks)],
                         nn.Linear(hidden, out))


class EmbeddingParams(RuleModel):
    """What the embedding-based parameterizations share: their sizes and their initialisation.
    Subclasses set `nonterminals`, `preterminals` and `vocab_size`."""

    nonterminals: int
    preterminals: int
    vocab_size: int

    @torch.no_grad()
    def _initialise(self, generator: torch.Generator | None) -> None:
        # Xavier-uniform for matrices, zeros for biases (as in the paper's released setup, from
        # memory); drawn in a fixed order from `generator`.
        for _, p in self.named_parameters():
            if p.dim() >= 2:
                fan_in, fan_out = p.shape[1], p.shape[0]
                bound = (6.0 / (fan_in + fan_out)) ** 0.5
                p.copy_((torch.rand(p.shape, generator=generator, dtype=torch.float64) * 2 - 1)
                        * bound)
            else:
                p.zero_()

    @property
    def sizes(self) -> tuple[int, int, int]:
        return self.nonterminals, self.preterminals, self.vocab_size


class NeuralParams(EmbeddingParams):
    """Rule distributions computed from symbol embeddings.

    nonterminals, preterminals, vocab_size: NT (default in configs 30), T (60), V.
    dim: embedding and hidden size (default 256, as in the paper).
    blocks: residual blocks in the root and lexical networks (default 2, as in the paper).
    generator: seeds the initialisation (PyTorch's default layer init, drawn from this generator
        so that a seed fixes the run).
    """

    def __init__(self, nonterminals: int, preterminals: int, vocab_size: int, dim: int = 256,
                 blocks: int = 2, generator: torch.Generator | None = None,
                 dtype: torch.dtype = torch.float32):
        super().__init__()
        s = nonterminals + preterminals
        self.nonterminals, self.preterminals, self.vocab_size = nonterminals, preterminals, \
            vocab_size
        self.start_embedding = nn.Parameter(torch.empty(1, dim))           # (1, d)
        self.nonterminal_embeddings = nn.Parameter(torch.empty(nonterminals, dim))  # (NT, d)
        self.preterminal_embeddings = nn.Parameter(torch.empty(preterminals, dim))  # (T, d)
        self.root_net = mlp(dim, blocks, nonterminals)
        self.binary_net = nn.Linear(dim, s * s)
        self.lexical_net = mlp(dim, blocks, vocab_size)
        self.to(dtype)
        self._initialise(generator)

    @classmethod
    def from_options(cls, options, vocab_size: int, generator: torch.Generator | None,
                     dtype: torch.dtype) -> "NeuralParams":
        return cls(options.nonterminals, options.preterminals, vocab_size, options.embedding_dim,
                   options.residual_blocks, generator, dtype)

    def rules(self) -> RuleTensors:
        nt = self.nonterminals
        root = torch.log_softmax(self.root_net(self.start_embedding)[0], 0)        # (NT,)
        binary = torch.log_softmax(self.binary_net(self.nonterminal_embeddings), 1)  # (NT, S*S)
        lexical = torch.log_softmax(self.lexical_net(self.preterminal_embeddings), 1)  # (T, V)
        s = nt + self.preterminals
        return RuleTensors(root, binary.view(nt, s, s), lexical)

    def to_grammar(self, nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                   start: str = "ROOT") -> Grammar:
        with torch.no_grad():
            return rules_to_grammar(self.rules(), nonterminals, preterminals, vocab, start)
