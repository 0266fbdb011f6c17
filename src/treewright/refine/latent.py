"""A latent-annotation PCFG: a coarse grammar whose every symbol has subcategories.

Latent annotations after Matsuzaki, Miyao & Tsujii 2005, "Probabilistic CFG with Latent
Annotations", grown and pruned by split-merge as in Petrov, Barrett, Thibaux & Klein 2006,
"Learning Accurate, Compact, and Interpretable Tree Annotation".

Storage follows the coarse rules (as Petrov et al. do): each coarse rule A -> B C carries a small
block of probabilities over the subcategories of A, B and C, padded to K = the largest number of
subcategories of any symbol. A coarse treebank grammar has a few hundred rules, so this stays
small where the dense fine grammar (NT*K) x (S*K)^2 would not.

- `rules`   (R, 3)  coarse (A, B, C) symbol indices (symbols: nonterminals first, as in Grammar)
- `words`   (L, 2)  coarse (X, word id)
- `tops`    (U,)    coarse symbols with a root rule start -> A
- `binary`  (R, K, K, K)  p(A_x -> B_y C_z), probabilities
- `lexical` (L, K)        p(X_x -> w)
- `root`    (U, K)        p(start -> A_x)
- `splits`  (S,)          subcategories of each symbol; entries at or past it are zero

Each fine left-hand side A_x sums to one over its binary and lexical rules; the root sums to one.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

# The subcategory names (NAME·k) belong to the grammar layer.
from treewright.grammar import Grammar, fine_name, split_name
from treewright.vocab import Vocabulary


@dataclass
class LatentGrammar:
    symbols: list[str]      # coarse symbols, the first `num_nt` are nonterminals
    num_nt: int
    vocab: Vocabulary
    start: str
    rules: Tensor           # (R, 3) long
    words: Tensor           # (L, 2) long
    tops: Tensor            # (U,) long
    binary: Tensor          # (R, K, K, K)
    lexical: Tensor         # (L, K)
    root: Tensor            # (U, K)
    splits: Tensor          # (S,) long

    @property
    def width(self) -> int:
        """K, the padded number of subcategories."""
        return self.lexical.shape[1]

    @property
    def valid(self) -> Tensor:
        """(S, K) bool: which subcategory slots exist."""
        return torch.arange(self.width) < self.splits[:, None]

    def with_params(self, binary: Tensor, lexical: Tensor, root: Tensor,
                    splits: Tensor | None = None) -> "LatentGrammar":
        return LatentGrammar(self.symbols, self.num_nt, self.vocab, self.start, self.rules,
                             self.words, self.tops, binary, lexical, root,
                             self.splits if splits is None else splits)

    def lhs_totals(self, binary: Tensor, lexical: Tensor) -> Tensor:
        """(S, K): per fine left-hand side, the sum of `binary` and `lexical` over its rules."""
        totals = binary.new_zeros(len(self.symbols), self.width)
        totals.index_add_(0, self.rules[:, 0], binary.sum((2, 3)))
        totals.index_add_(0, self.words[:, 0], lexical)
        return totals

    def normalization_error(self) -> float:
        """Largest |1 - row sum| over existing fine left-hand sides and the root."""
        totals = self.lhs_totals(self.binary, self.lexical)[self.valid]
        return max(float((totals - 1).abs().max()), abs(float(self.root.sum()) - 1))

    def num_fine(self) -> int:
        return int(self.splits.sum())

    # ---- dense fine grammar --------------------------------------------------------------

    def fine_index(self) -> Tensor:
        """(S, K) long: the dense fine symbol index of each subcategory (-1 where none), with
        every nonterminal's subcategories before every preterminal's, as `Grammar` wants."""
        index = torch.full((len(self.symbols), self.width), -1, dtype=torch.long)
        valid = self.valid
        index[valid] = torch.arange(int(valid.sum()))
        return index

    def fine_names(self) -> list[str]:
        return [fine_name(s, k) for s, n in zip(self.symbols, self.splits.tolist())
                for k in range(n)]

    def fine_num_nt(self) -> int:
        return int(self.splits[:self.num_nt].sum())

    def to_grammar(self, dtype: torch.dtype = torch.float64) -> Grammar:
        """The dense fine `Grammar` with symbols NAME·k (log-probabilities)."""
        fid = self.fine_index()
        names = self.fine_names()
        nt_f, s_f = self.fine_num_nt(), len(names)
        valid = self.valid
        A, B, C = self.rules.unbind(1)
        block = valid[A][:, :, None, None] & valid[B][:, None, :, None] & valid[C][:, None, None, :]
        r, x, y, z = block.nonzero(as_tuple=True)
        binary = torch.zeros(nt_f, s_f, s_f, dtype=torch.float64)
        binary[fid[A[r], x], fid[B[r], y], fid[C[r], z]] = self.binary[r, x, y, z].double()
        X, W = self.words.unbind(1)
        l, x = valid[X].nonzero(as_tuple=True)
        lexical = torch.zeros(s_f, len(self.vocab), dtype=torch.float64)
        lexical[fid[X[l], x], W[l]] = self.lexical[l, x].double()
        u, x = valid[self.tops].nonzero(as_tuple=True)
        root = torch.zeros(nt_f, dtype=torch.float64)
        root[fid[self.tops[u], x]] = self.root[u, x].double()
        return Grammar(names[:nt_f], names[nt_f:], self.vocab, root.log().to(dtype),
                       binary.log().to(dtype), lexical.log().to(dtype), self.start)

    def dense_counts(self, binary: Tensor, lexical: Tensor, root: Tensor
                     ) -> tuple[Tensor, Tensor, Tensor]:
        """Gather dense fine tensors (NTf, Sf, Sf), (Sf, V), (NTf,) back into this grammar's
        rule blocks (R, K, K, K), (L, K), (U, K); slots that do not exist get zero."""
        fid = self.fine_index().clamp(min=0)
        valid = self.valid.to(binary.dtype)
        A, B, C = self.rules.unbind(1)
        nt_fid = fid.clamp(max=binary.shape[0] - 1)
        out_b = binary[nt_fid[A][:, :, None, None], fid[B][:, None, :, None],
                       fid[C][:, None, None, :]]
        out_b = out_b * valid[A][:, :, None, None] * valid[B][:, None, :, None] \
            * valid[C][:, None, None, :]
        X, W = self.words.unbind(1)
        out_l = lexical[fid[X], W[:, None]] * valid[X]
        out_r = root[nt_fid[self.tops]] * valid[self.tops]
        return out_b, out_l, out_r


def _coarse_inventory(names: list[str], num_nt: int):
    """Group fine names into coarse symbols: (coarse symbols, coarse nt count, per fine name
    its (coarse index, subcategory)). A coarse symbol is a nonterminal when any of its
    subcategories is (a reloaded subcategory may have lost all its binary rules). Raises
    ValueError when one coarse symbol's subcategories are not numbered 0..n-1."""
    coarse: dict[str, list[int]] = {}
    kinds: dict[str, set[bool]] = {}
    place_names = []
    for i, name in enumerate(names):
        base, k = split_name(name)
        place_names.append((base, 0 if k is None else k))
        coarse.setdefault(base, []).append(place_names[-1][1])
        kinds.setdefault(base, set()).add(i < num_nt)
    for base, ks in coarse.items():
        if sorted(ks) != list(range(len(ks))):
            raise ValueError(f"the subcategories of {base} are numbered {sorted(ks)}, "
                             f"not 0..{len(ks) - 1}")
    symbols = [b for b in coarse if True in kinds[b]] + [b for b in coarse if True not in kinds[b]]
    index = {b: i for i, b in enumerate(symbols)}
    place = [(index[base], k) for base, k in place_names]
    return symbols, sum(1 for b in symbols if True in kinds[b]), place, [len(coarse[b])
                                                                         for b in symbols]


def latent_from_grammar(grammar: Grammar) -> LatentGrammar:
    """A `LatentGrammar` from a dense `Grammar`. Symbols named NAME·k become subcategory k of
    NAME; other symbols have one subcategory. The coarse rule inventory is every coarse rule
    with some fine rule of positive probability. Probabilities are float64."""
    names = grammar.symbols
    nt = len(grammar.nonterminals)
    symbols, num_nt, place, counts = _coarse_inventory(names, nt)
    K = max(counts)
    coarse_of = torch.tensor([p[0] for p in place])
    sub_of = torch.tensor([p[1] for p in place])
    bin_p = grammar.binary.double().exp()
    lex_p = grammar.lexical.double().exp()
    root_p = grammar.root.double().exp()
    a, b, c = bin_p.nonzero(as_tuple=True)
    keys = torch.stack([coarse_of[a], coarse_of[b], coarse_of[c]], 1)
    rules, rule_of = torch.unique(keys, dim=0, return_inverse=True)
    binary = torch.zeros(len(rules), K, K, K, dtype=torch.float64)
    binary[rule_of, sub_of[a], sub_of[b], sub_of[c]] = bin_p[a, b, c]
    x, w = lex_p.nonzero(as_tuple=True)
    wkeys = torch.stack([coarse_of[x], w], 1)
    words, word_of = torch.unique(wkeys, dim=0, return_inverse=True)
    lexical = torch.zeros(len(words), K, dtype=torch.float64)
    lexical[word_of, sub_of[x]] = lex_p[x, w]
    (t,) = root_p.nonzero(as_tuple=True)
    tops, top_of = torch.unique(coarse_of[t], return_inverse=True)
    root = torch.zeros(len(tops), K, dtype=torch.float64)
    root[top_of, sub_of[t]] = root_p[t]
    return LatentGrammar(symbols, num_nt, grammar.vocab, grammar.start, rules, words, tops,
                         binary, lexical, root, torch.tensor(counts))


def normalize(lg: LatentGrammar, binary: Tensor, lexical: Tensor, root: Tensor) -> LatentGrammar:
    """The M-step: expected counts -> probabilities (count ratios per fine left-hand side).
    A fine left-hand side with no counts at all keeps its current probabilities."""
    totals = lg.lhs_totals(binary, lexical)                      # (S, K)
    empty = totals <= 0
    safe = torch.where(empty, torch.ones_like(totals), totals)
    A, X = lg.rules[:, 0], lg.words[:, 0]
    new_b = binary / safe[A][:, :, None, None]
    new_l = lexical / safe[X]
    new_b = torch.where(empty[A][:, :, None, None], lg.binary, new_b)
    new_l = torch.where(empty[X], lg.lexical, new_l)
    total_root = root.sum()
    new_r = root / total_root if total_root > 0 else lg.root
    return lg.with_params(new_b, new_l, new_r)
