"""Decoders: from a grammar and a sentence to one tree.

- `viterbi`: the most probable tree (the engine's max-semiring pass).
- `mbr`: minimum Bayes risk for unlabeled bracket recall, the binary tree that maximizes the sum
  of its spans' posterior marginals (Goodman 1996, "Parsing Algorithms and Metrics"), found by a
  small CKY over the engine's span marginals; the usual decoder of unsupervised parsing. Each span
  is then labeled with its most probable symbol.
- `max-rule-product`: for refined grammars, the tree of coarse categories that maximizes the
  product of its anchored coarse-rule posteriors (Petrov & Klein 2007, "Improved Inference for
  Unlexicalized Parsing", section 3). A refined grammar names its subcategories `NAME·k`, and
  `grammar.coarse_name` maps them to `NAME`; other symbols are their own coarse symbol, so on an
  unrefined grammar this is max-rule-product over the grammar's own symbols.

The labeled marginals, inside and outside scores come from `engine.span_tables` (the engine's
own outside pass, batched; `mbr` asks for the marginals alone); both decoders then work one span
width at a time over every span of every sentence of a batch (max-rule-product on an unrefined
grammar is the engine's max-semiring pass), or, for max-rule-product where a trained grammar's
posteriors rule out most labeled spans, over the labeled spans they leave (exactly: see
`max_rule_product`). On independent productions (`params.IndependentRules`) the anchored rule
posterior factors into a left and a right part, and max-rule-product is a chart pass of
max-plus products per span (`_max_rule_product_independent`). Each decoded tree's
probability, summed over the refinements of its labels, is one inside pass over the nodes of
all trees of a batch (`TreeScorer`).

A lexicalized model (`params.lexicalized`, Yang, Zhao & Tu 2021) is no `Grammar`: `decode_heads`
reads the model itself and gives each sentence its best derivation as a tree and the head of
every word (`HeadedParse`).

One decoder reads several grammars (`ENSEMBLE_DECODERS`, run by `consensus`), for example the
restarts of one training run:

- `consensus`: tree averaging (Shayegh, Cao, Zhu, Cheung & Mou 2024, "Ensemble Distillation for
  Unsupervised Constituency Parsing"): each grammar's unlabeled MBR tree votes once per span,
  and the binary tree with the largest summed F1 against those trees is kept, labeled as the
  `mbr` decoder labels it under the first grammar that parses the sentence.
"""

from __future__ import annotations

import functools
import math
from collections import Counter
from dataclasses import dataclass
from typing import Callable, Sequence

import torch
from torch import Tensor

from treewright import engine
from treewright.corpus.batching import DECODE_BATCH, length_batches
from treewright.corpus.transforms import has_transform_marks, treebank_form
from treewright.grammar import Grammar, coarse_name
from treewright.engine import anchored
from treewright.engine.lexicalized import LexicalizedParse
from treewright.engine.maxplus import MaxPlusWeights, max_plus
from treewright.errors import InputError
from treewright.inference import encode, encode_ids, pad_ids, spans_to_tree
from treewright.params.independent import IndependentRules
from treewright.params.lexicalized import LexicalizedParams
from treewright.params.tabular import rules_to_grammar
from treewright.trees import Tree, tree_from_spans
from treewright.vocab import Vocabulary
from treewright.word_pieces import piece_mask

NEG_INF = float("-inf")
DECODERS = ("viterbi", "mbr", "max-rule-product")
ENSEMBLE_DECODERS = ("consensus",)  # decoders of several grammars (`consensus`)
MODEL_DECODERS = ("lexicalized",)   # decoders of a lexicalized model (`decode_lexicalized`)
# The word-piece constraint at decoding: host side ("first" or "last") and, per sentence, the
# `word_pieces.barred_positions` of its `piece_joins`.
Pieces = tuple[str, Sequence[Sequence[int]]]


def treebank_tree(tree: Tree, treebank: bool | None = None) -> Tree:
    """A decoded tree as the commands write it: a refined treebank grammar's tree with its
    labels projected to the coarse symbols and its CNF transforms undone, as refinement's
    held-out labeled F1 reads it (`corpus.treebank_form`); any other tree unchanged.
    `treebank`: whether the grammar is a treebank's (`is_treebank_grammar`), so that all its
    trees are written alike; None decides from the tree's labels."""
    return treebank_form(tree, coarse_name, treebank)


def is_treebank_grammar(grammars: Sequence[Grammar]) -> bool:
    """True if any of `grammars` was estimated from a treebank's binarized trees (its symbols
    carry the transforms' marks): its trees are written in the treebank's form."""
    return any(has_transform_marks(g.symbols) for g in grammars)


def mbr_spans(span_marginals: Tensor, length: int) -> list[tuple[int, int]]:
    """The spans (start, end) of width >= 2 of the best binary tree over `length` words.

    span_marginals: (N+1, N+1) indexed [start, width], as in `engine.Posteriors.spans` for one
        sentence (N >= length). Ties go to the leftmost split, so the result is deterministic.
    Returns n - 1 spans, the whole sentence included, for n >= 2; [] for one word.
    """
    return mbr_spans_batch(span_marginals[None], [length])[0]


def mbr_spans_batch(span_marginals: Tensor, lengths: Sequence[int]
                    ) -> list[list[tuple[int, int]]]:
    """`mbr_spans` for a batch: span_marginals (B, N+1, N+1), one list of spans per sentence.

    A CKY over the span scores (Goodman 1996), one width at a time for every span of every
    sentence: best[i, w] = gain[i, w] + max over splits u of best[i, u] + best[i+u, w-u].
    """
    gain = span_marginals.double()
    B, N1, _ = gain.shape
    N = max(lengths, default=0)
    best = torch.zeros(B, N1, N1, dtype=torch.float64)           # width one scores nothing
    split = torch.zeros(B, N1, N1, dtype=torch.long)
    for w in range(2, N + 1):
        P = N - w + 1
        us = torch.arange(1, w)
        starts = torch.arange(P)[:, None] + us[None, :]              # (P, U)
        options = best[:, 0:P][:, :, us] + best[:, starts, w - us]   # (B, P, U)
        value, arg = options.max(-1)                                 # the first best: leftmost
        best[:, 0:P, w] = value + gain[:, 0:P, w]
        split[:, 0:P, w] = arg + 1
    splits = split.tolist()
    out = []
    for b, n in enumerate(lengths):
        spans: list[tuple[int, int]] = []
        stack = [(0, n)] if n >= 2 else []
        while stack:
            i, j = stack.pop()
            if j - i < 2:
                continue
            spans.append((i, j))
            k = i + splits[b][i][j - i]
            stack.extend([(k, j), (i, k)])
        out.append(spans)
    return out


def tree_average(trees: Sequence[Sequence[tuple[int, int]]], length: int
                 ) -> list[tuple[int, int]]:
    """The binary tree over `length` words with the largest summed F1 against `trees` (the
    spans, width >= 2, of one binary tree each, e.g. several restarts' MBR trees): tree
    averaging of Shayegh, Cao, Zhu, Cheung & Mou 2024, "Ensemble Distillation for Unsupervised
    Constituency Parsing". Every binary tree has n - 1 spans, so summed F1 is the summed count
    of input trees containing each of its spans over n - 1: CKY over those votes
    (`mbr_spans`). Each tree votes once, unlike averaging span posteriors, where one confident
    grammar can outvote the others. Returns spans as `mbr_spans` does."""
    return tree_average_batch([trees], [length])[0]


def agreed_spans(trees: Sequence[Sequence[tuple[int, int]]], agreement: float
                 ) -> list[tuple[int, int]]:
    """The spans that at least `agreement` (above 1/2, at most 1) of `trees` (each the spans of
    one binary tree over the same words, e.g. several restarts' MBR trees) contain, sorted.
    Above one half, two kept spans share a tree, so they never cross: the result is the
    bracketing of some binary tree, usually not a whole one. ValueError for an agreement
    outside (1/2, 1] or no trees."""
    if not 0.5 < agreement <= 1:
        raise ValueError(f"agreement must be above 1/2 and at most 1, got {agreement}")
    if not trees:
        raise ValueError("no trees to agree")
    votes = Counter(span for tree in trees for span in set(tree))
    # A count must reach the fraction of the trees; the tolerance keeps 2/3 of 3 at 2.
    need = agreement * len(trees) - 1e-9
    return sorted(span for span, count in votes.items() if count >= need)


def tree_average_batch(trees: Sequence[Sequence[Sequence[tuple[int, int]]]],
                       lengths: Sequence[int], pot: Tensor | None = None
                       ) -> list[list[tuple[int, int]]]:
    """`tree_average` for a batch: `trees[b]` holds sentence b's input trees (any number, at
    least one for a sentence of two words or more), one CKY (`mbr_spans_batch`) for all;
    with `pot` (B, >= N+1, >= N+1), never a span where it is -inf (`barred_out`)."""
    N = max(lengths, default=0)
    votes = torch.zeros(len(lengths), N + 1, N + 1, dtype=torch.float64)  # (B, N+1, N+1)
    for b, sentence_trees in enumerate(trees):
        for tree in sentence_trees:
            for i, j in tree:
                votes[b, i, j - i] += 1
    return mbr_spans_batch(barred_out(votes, pot), lengths)


@dataclass
class Decoded:
    """One decoded sentence. `tree` is None when the grammar (for consensus: every grammar)
    cannot parse the sentence."""
    tree: Tree | None
    log_likelihood: float   # log p(sentence), summed over all trees; -inf when no parse
    tree_logprob: float | None  # log p(tree, sentence), summed over every refinement of the
                                # tree's labels (coarse trees); -inf if the grammar cannot build
                                # the tree; None when not asked for (`decode(tree_logprobs=...)`)
    score: float            # the decoder's objective: log p(tree) for viterbi, expected number
                            # of correct spans for mbr, log product of rule posteriors for mrp,
                            # mean F1 against the grammars' MBR trees for consensus

    @property
    def posterior(self) -> float:
        """p(tree | sentence); 0 when there is no parse."""
        if self.tree_logprob is None:
            raise ValueError("the tree's log-probability was not computed: decode with "
                             "tree_logprobs=True")
        if self.log_likelihood == NEG_INF or self.tree_logprob == NEG_INF:
            return 0.0
        return math.exp(self.tree_logprob - self.log_likelihood)


def span_tables(grammar: Grammar, sentences: Sequence[Sequence[str]],
                dtype: torch.dtype = torch.float64, log_scores: bool = True,
                span_pot: Tensor | None = None) -> engine.SpanTables:
    """The engine's batched label marginals, log inside and log outside (over Z) tables of
    every symbol over every span of the sentences (see `engine.SpanTables`; the last two only
    with `log_scores`), over the trees `span_pot` (B, N+1, N+1) allows when given."""
    enc = encode(grammar, sentences, dtype)
    return engine.span_tables(grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal,
                              enc.lengths, enc.nt_terminal, log_scores, span_pot)


def coarse_groups(symbols: Sequence[str]) -> tuple[list[str], Tensor]:
    """The coarse names in order of first appearance and the (S, K) 0/1 membership matrix."""
    names: dict[str, int] = {}
    for s in symbols:
        names.setdefault(coarse_name(s), len(names))
    member = torch.zeros(len(symbols), len(names), dtype=torch.float64)
    for k, s in enumerate(symbols):
        member[k, names[coarse_name(s)]] = 1.0
    return list(names), member


def _shifted(log_x: Tensor, dims: int = 1) -> tuple[Tensor, Tensor]:
    """exp(log_x - m) and m, m the maximum over the last `dims` axes (0 where all are -inf)."""
    m = log_x.flatten(-dims).amax(-1)
    m = m.masked_fill(~torch.isfinite(m), 0.0)
    return (log_x - m.view(*m.shape, *(1,) * dims)).exp(), m


@dataclass
class CoarseLayout:
    """A grammar's symbols laid out by coarse symbol, for `max_rule_product`.

    `slots` (K, G) holds the fine indices of each coarse symbol's G subcategory slots, in
    increasing order (nonterminals first), S (one past the last symbol) in unused slots; the
    first Kp coarse symbols have nonterminal subcategories (groups appear in symbol order,
    nonterminals first). `binary` (NT, S, S) holds the fine binary rules' probabilities, as
    the pruned pass (`_max_rule_product_items`) reads them through `slots`. `rules` holds
    them in the chart pass's layout (`_max_rule_product_refined`), made when it first asks:
    with zeros in unused slots and for subcategories that are no nonterminal, rules[x, a,
    (c, y, b, z)] = p(x_a -> y_b z_c), (Kp, G, G*K*G*K). A trained grammar's posteriors
    mostly take the pruned pass alone, so that layout, mostly the zeros of unused slots
    where few symbols are split, is often never made.

    Factored rules (`of_rules`: independent productions, low-rank) have no rule tensor: every
    symbol is its own coarse symbol (G = 1, `member` None for the identity), `binary` and
    `rules` are None (no pass over the whole chart: `factored`), and `binary_logprob` gives
    the rules the item pass reads.

    `chart_bytes` is the size `rules` would take. Over `MRP_LAYOUT_AT_MOST` it is never made:
    every sentence then takes the pruned pass, under a floor or none (`chart_fits`).
    """
    names: list[str]            # K coarse symbols
    slots: Tensor               # (K, G) long
    member: Tensor | None       # (S, K) 0/1; None: the identity (every symbol its own)
    num_parents: int            # Kp
    binary: Tensor | None       # (NT, S, S) probabilities; None: factored rules
    nt: int                     # fine nonterminals
    binary_logprob: Callable[[Tensor, Tensor, Tensor], Tensor] | None = None
    chart_bytes: int = 0        # of `rules`

    @classmethod
    def of(cls, grammar: Grammar, dtype: torch.dtype) -> "CoarseLayout":
        names, member = coarse_groups(grammar.symbols)
        S, K = member.shape
        nt = len(grammar.nonterminals)
        G = int(member.sum(0).max())
        slots = torch.full((K, G), S, dtype=torch.long)
        for k in range(K):
            fine = member[:, k].nonzero().flatten()
            slots[k, :len(fine)] = fine
        coarse_of = member.argmax(1)
        kp = int(coarse_of[:nt].max()) + 1 if nt else 0
        size = kp * G * (K * G) ** 2 * torch.finfo(dtype).bits // 8      # `rules`
        return cls(names, slots, member.to(dtype), kp, grammar.binary.to(dtype).exp(), nt,
                   chart_bytes=size)

    @classmethod
    def of_rules(cls, binary_logprob: Callable[[Tensor, Tensor, Tensor], Tensor],
                 symbols: Sequence[str], nt: int) -> "CoarseLayout":
        """The layout of factored rules: `binary_logprob(a, b, c)` gives log p(a -> b c) for
        index tensors of one shape (`IndependentRules.binary_logprob`)."""
        return cls(list(symbols), torch.arange(len(symbols))[:, None], None, nt, None, nt,
                   binary_logprob)

    @property
    def factored(self) -> bool:
        """Factored rules: no rule tensor, so no pass over the whole chart."""
        return self.binary is None

    @property
    def chart_fits(self) -> bool:
        """Whether the chart pass's layout (`rules`) may be made: within `MRP_LAYOUT_AT_MOST`
        (an unrefined grammar's chart pass reads the grammar itself: always)."""
        return self.slots.shape[1] == 1 or self.chart_bytes <= MRP_LAYOUT_AT_MOST

    @functools.cached_property
    def counts(self) -> tuple[Tensor, Tensor]:
        """(K,) each coarse symbol's number of subcategories and (K,) of nonterminal ones."""
        S = self.slots.shape[0] if self.member is None else self.member.shape[0]
        return anchored.subcategory_counts(self.slots, self.nt, S)

    @functools.cached_property
    def rules(self) -> Tensor | None:
        """(Kp, G, G*K*G*K) the rules in the chart pass's order (see the class); None for
        factored rules."""
        if self.binary is None:
            return None
        kp, (K, G), nt = self.num_parents, self.slots.shape, self.nt
        if not self.chart_fits:
            raise InputError(
                f"max-rule-product's pass over the whole chart would hold this grammar's rules "
                f"by coarse rule in {self.chart_bytes / 2 ** 30:.1f} GiB ({kp} coarse "
                f"nonterminals, {K} coarse symbols, at most {G} subcategories a symbol), over "
                f"the {MRP_LAYOUT_AT_MOST / 2 ** 30:.0f} GiB it takes; decode it pruned "
                f"(`prune=True`, the default), which never makes that layout")
        S = self.binary.shape[1]
        # Each fine rule written to its place, (x, a, c, y, b, z): most of the layout is the
        # zeros of unused slots, so scattering the rules is cheaper than gathering every entry.
        slot_of = torch.zeros(S, dtype=torch.long)                       # fine -> its slot
        used = self.slots < S
        slot_of[self.slots[used]] = torch.arange(G).expand(K, G)[used]
        coarse_of = torch.zeros(S, dtype=torch.long)                     # fine -> coarse
        coarse_of[self.slots[used]] = torch.arange(K)[:, None].expand(K, G)[used]
        x, a = coarse_of[:nt].view(-1, 1, 1), slot_of[:nt].view(-1, 1, 1)
        y, b = coarse_of.view(1, S, 1), slot_of.view(1, S, 1)
        z, c = coarse_of.view(1, 1, S), slot_of.view(1, 1, S)
        where = ((((x * G + a) * G + c) * K + y) * G + b) * K + z
        rules = self.binary.new_zeros(kp * G * G * K * G * K)
        rules[where.flatten()] = self.binary.flatten()
        return rules.view(kp, G, -1)

    def coarse_log(self, marginals: Tensor) -> Tensor:
        """(B, N+1, N+1, K) the log marginals of the coarse labels.

        A preterminal spans one word, so over two or more words only the nonterminals' columns
        and the Kp coarse parents (every nonterminal's coarse symbol is one of them) are
        read: the other labels there are -inf without a logarithm each (most of the table)."""
        B, N1, _, _ = marginals.shape
        K, kp, nt = self.slots.shape[0], self.num_parents, self.nt
        out = marginals.new_full((B, N1, N1, K), NEG_INF)
        one, wide = marginals[:, :, 1], marginals[:, :, 2:, :nt]
        if self.member is not None:
            one, wide = one @ self.member, wide @ self.member[:nt, :kp]
        out[:, :, 1] = one.log()
        out[:, :, 2:, :kp] = wide.log()
        return out


MRP_CHUNK = 2 ** 20  # anchored rules per chunk of factored rules' log q (`_factored_log_q`)
MRP_LAYOUT_AT_MOST = 2 ** 33  # bytes of max-rule-product's rules laid out for its chart pass
                              # (`CoarseLayout.rules`), Kp K**2 G**3 entries: 1.8 GiB in
                              # float64 at 24 coarse parents, 50 coarse symbols and G = 16;
                              # over it, the pruned pass decodes every sentence
PRUNE_NATS_PER_WORD = 1.5  # max-rule-product's first floor: log mu >= -1.5 nats per word
PRUNE_AT_MOST = 0.5        # ... used only when it leaves out at least half the pairs
UNREFINED_PRUNE_FROM = 3_000_000  # an unrefined grammar's chart pass per sentence (mean over
                                  # the batch, `_viterbi_cost` units) below which max-rule-product
                                  # takes it without pruning. Measured 2026-12-05, one thread, 200
                                  # sentences, pruned against whole: 20/30 grammars (0.7 M a
                                  # sentence) 0.15-0.18 s against 0.12-0.15, at most even; 60/120
                                  # (14 M) 0.71 against 1.15


def _tree_bound(coarse_log: Tensor, lengths: Tensor, num_parents: int) -> Tensor:
    """(B, N+1, N+1, K) for every labeled span, an upper bound on the log max-rule-product
    score of any tree that holds it (-inf where none can), from the coarse label log marginals
    `coarse_log` (B, N+1, N+1, K) alone, plus `_slack` for rounding (`engine.anchored.
    tree_bounds`).

    Every factor of a tree's score is a posterior: a binary node's rule posterior is at most
    the label marginal mu of each of its three labeled spans, a word's label posterior and the
    top label's are marginals themselves. So a tree's score is at most the product, over its
    binary nodes, of the least of their spans' bounds (the labeled span's own mu; for the
    others the best label's), times every word's and the top label's: the best such product
    over the trees holding a labeled span is a max-semiring inside and outside pass over those
    bounds, an admissible estimate in the sense of A* parsing (Klein & Manning 2003). A floor
    below the best tree's score keeps every labeled span of that tree, as under mu alone, and
    leaves out far more of a trained grammar's chart: on a refined grammar trained on Turkish
    text (G = 4, 200 sentences of up to 20 words), at a floor equal to each sentence's best
    score, 18 times fewer anchored rules than the bound that charged each binary node its
    parent span's bound alone (and that one 14 times fewer than mu alone on the EM-trained
    30/60 grammar of `bench_parse_speed.py`).
    """
    return anchored.tree_bounds(coarse_log, lengths, num_parents, _slack(coarse_log.dtype))


def max_rule_product(grammar: Grammar | None, tables: engine.SpanTables, lengths: Sequence[int],
                     layout: CoarseLayout | None = None, prune: bool = True
                     ) -> list[tuple[list[tuple[int, int, str]], float] | None]:
    """Per sentence, the coarse tree maximizing the product of anchored coarse-rule posteriors
    (None for a sentence with no parse).

    Petrov & Klein 2007, "Improved Inference for Unlexicalized Parsing", section 3: with
    r(A -> B C, i, k, j) = O(A, i, j) p(A -> B C) I(B, i, k) I(C, k, j) / p(sentence), the coarse
    rule posterior q(a -> b c, i, k, j) sums r over the subcategories of a, b and c. The tree's
    score multiplies q over its binary nodes, the coarse label posterior of each word's
    preterminal (its lexical rule), and the posterior of the top label (the root rule).
    Returns the labeled spans (start, end, coarse label), words included, and the log score.
    `layout`: `CoarseLayout.of(grammar, dtype)`, made here when not given (a caller decoding
    many batches makes it once); for factored rules, `CoarseLayout.of_rules` (`grammar` None):
    see `_max_rule_product_factored`, always pruned (they have no pass over the whole chart).

    Exact pruning (`prune`). Every factor of the score is a posterior probability, and each is
    at most the marginal mu of every labeled span it involves (a rule used over a span implies
    its parent and children there). So a tree's score is at most the smallest mu among its
    labeled spans, and, sharper, at most the product of such bounds over its nodes: for each
    labeled span, `_tree_bound` gives the best such product over the trees that hold it. A
    tree holding a labeled span whose bound is below the score of any other tree cannot be the
    best. The pass first leaves out every labeled span with a bound below a floor of
    `PRUNE_NATS_PER_WORD` nats per word (when that leaves out at least half of the sentence's
    (span of two or more words, coarse parent) pairs: `PRUNE_AT_MOST`; otherwise, for diffuse
    posteriors, on a refined grammar the score of one known tree, `_known_tree_floor`, and on
    an unrefined one none: its chart pass is fast), raised to a known tree's score where the
    item pass under it would be large; when the best tree it finds scores at or above the
    floor, that bound makes it the best of all trees. Otherwise the sentence is
    decoded again with its own found score as the floor (or, on a refined grammar, a known
    tree's when nothing was found), which is exact by the same bound. What is kept is decoded
    by the cheaper of two passes (`_max_rule_product_floored`): over the labeled spans kept
    (`_max_rule_product_items`) or over the chart. The trees and scores are those of the pass
    without pruning (scores up to rounding); only the time differs (the posteriors of a
    trained grammar leave most spans out: see README, "Parsing against training speed").
    """
    dtype = tables.marginals.dtype
    lay = CoarseLayout.of(grammar, dtype) if layout is None else layout
    n = torch.tensor(list(lengths))
    if lay.factored:
        return _max_rule_product_factored(tables, lengths, lay)
    # Without pruning, or on an unrefined grammar whose whole chart pass costs less than
    # finding what to leave out would (the bounds, the kept labels, a known tree): the chart.
    if not prune or lay.slots.shape[1] == 1 and \
            float(_viterbi_cost(n, lay).double().mean()) < UNREFINED_PRUNE_FROM:
        return _chart_pass(lay)(grammar, tables, lengths, lay, None)[0]
    floor = -PRUNE_NATS_PER_WORD * n.to(dtype)
    # A sentence whose floor would keep more than half of its (span, coarse parent) pairs
    # (diffuse posteriors, as an untrained grammar's) does not take it: the first pass would
    # save little and might have to run again. It takes one known tree's score instead (below),
    # which needs no second pass.
    N1 = tables.marginals.shape[1]
    start, width = torch.arange(N1)[:, None], torch.arange(N1)[None, :]
    spans = (width >= 2) & (start + width <= n[:, None, None])          # (B, N+1, N+1)
    coarse_log = lay.coarse_log(tables.marginals)                  # (B, N+1, N+1, K)
    bound = _tree_bound(coarse_log, n, lay.num_parents)
    parent_bound = bound[..., :lay.num_parents]
    kept = ((parent_bound >= floor[:, None, None, None]) & spans[..., None]).sum((1, 2, 3)) / \
        (spans.sum((1, 2)) * lay.num_parents).clamp(min=1)
    refined = lay.slots.shape[1] > 1    # (an unrefined grammar's chart pass is the fast one)
    diffuse = (kept > PRUNE_AT_MOST) & torch.isfinite(tables.logz) & refined
    floor = floor.masked_fill(kept > PRUNE_AT_MOST, NEG_INF)
    # A known tree's score often leaves fewer anchored rules than the floor per word (3 to 12
    # times fewer on the refined Turkish grammars of README's "Parsing against training
    # speed"), but under the tree bound the item pass over them is cheap, and finding the
    # tree costs more than it saves unless that pass is large (`KNOWN_TREE_FROM`). It is
    # sought only where the item pass could then be the cheaper one.
    kept_labels = _kept_labels(bound, n, lay.num_parents, floor)
    costs = _pass_costs(kept_labels, lay, n)
    finite = torch.isfinite(floor)
    rules, entries, chart = (int(c[finite].sum()) for c in costs)
    known = None   # the kept labels and costs under the floor per word, unless it is raised
    if finite.any() and entries > KNOWN_TREE_FROM and \
            _item_work(rules, entries) <= KNOWN_TREE_GAIN * chart:
        floor = torch.maximum(floor, _known_tree_floor(grammar, tables, lengths, lay, floor,
                                                       coarse_log, bound))
    else:
        known = (kept_labels, *costs)
    if diffuse.any():
        # Without a floor these would take the chart pass, which on a trained grammar's few
        # diffuse sentences costs far more than the item pass under a known tree's score
        # (about a second a sentence of 15-20 words with G = 4); on an untrained grammar the
        # choice between the passes (`_max_rule_product_floored`) still takes the chart.
        rows = diffuse.nonzero().flatten()
        floor[rows] = _known_tree_floor(grammar, tables, lengths, lay, floor, coarse_log, bound,
                                        rows=rows)[rows]
        known = None
    results, values, floor = _max_rule_product_floored(grammar, tables, lengths, lay, floor,
                                                       coarse_log, bound, known)
    parsed = torch.isfinite(tables.logz)
    redo = (parsed & ~(values >= floor)).nonzero().flatten()
    # Where the floor left no tree at all, the second pass would have no floor and take the
    # chart pass (about a second a sentence of 15-20 words on a refined grammar with G = 4);
    # one known tree's score gives it one, exact as above.
    lost = redo[torch.isneginf(values[redo])] if refined else redo[:0]
    if len(lost):
        values[lost] = _known_tree_floor(grammar, tables, lengths, lay, floor.new_full(
            floor.shape, NEG_INF), coarse_log, bound, rows=lost)[lost]
    return _decode_again(grammar, tables, lengths, lay, results, redo, values, coarse_log, bound)


def _decode_again(grammar: Grammar | None, tables: engine.SpanTables, lengths: Sequence[int],
                  lay: CoarseLayout, results: list, redo: Tensor, floor: Tensor,
                  coarse_log: Tensor, bound: Tensor) -> list:
    """`results` with the sentences `redo` decoded again under their entries of `floor`."""
    if len(redo):
        again, _, _ = _max_rule_product_floored(grammar, tables.rows(redo),
                                                [lengths[b] for b in redo.tolist()], lay,
                                                floor[redo], coarse_log[redo], bound[redo])
        for b, result in zip(redo.tolist(), again):
            results[b] = result
    return results


def _max_rule_product_factored(tables: engine.SpanTables, lengths: Sequence[int],
                               lay: CoarseLayout
                               ) -> list[tuple[list[tuple[int, int, str]], float] | None]:
    """`max_rule_product` on factored rules (`CoarseLayout.of_rules`), which have no pass over
    the whole chart: the item pass alone, every sentence's floor the score of a known tree
    (`_known_tree_floor`, sought with no floor of its own). The best tree scores at least
    that, so the pass finds it, exactly, with no second pass. A sentence whose known labeling
    scores zero (a rule of probability zero) keeps every labeled span its bound allows."""
    dtype = tables.marginals.dtype
    n = torch.tensor(list(lengths))
    coarse_log = lay.coarse_log(tables.marginals)
    bound = _tree_bound(coarse_log, n, lay.num_parents)
    lowest = torch.full((len(lengths),), torch.finfo(dtype).min, dtype=dtype)   # no floor
    floor = _known_tree_floor(None, tables, lengths, lay, lowest, coarse_log, bound)
    floor = torch.where(torch.isfinite(floor), floor, lowest)
    results, values, _ = _max_rule_product_floored(None, tables, lengths, lay, floor, coarse_log,
                                                   bound)
    # Rounding beyond the slack could leave a parsed sentence without its tree: keep all.
    redo = (torch.isfinite(tables.logz) & torch.isneginf(values)).nonzero().flatten()
    return _decode_again(None, tables, lengths, lay, results, redo, lowest, coarse_log, bound)


class _IndependentFactors:
    """The factors of independent productions as `engine.maxplus.max_plus` reads them, made
    once for every batch: (left, right) over preterminal children (`words`) and over
    nonterminal ones (`spans`)."""

    def __init__(self, rules: IndependentRules, nt: int, dtype: torch.dtype):
        left, right = rules.left.to(dtype), rules.right.to(dtype)
        self.words = (MaxPlusWeights(left[:, nt:]), MaxPlusWeights(right[:, nt:]))
        self.spans = (MaxPlusWeights(left[:, :nt]), MaxPlusWeights(right[:, :nt]))


def _max_rule_product_independent(rules: IndependentRules, tables: engine.SpanTables,
                                  lengths: Sequence[int], symbols: Sequence[str], nt: int,
                                  factors: _IndependentFactors | None = None
                                  ) -> list[tuple[list[tuple[int, int, str]], float] | None]:
    """`max_rule_product` on independent productions (`params.IndependentRules`: p(A -> B C)
    = p(B | A, left) p(C | A, right); Liu, Yang, Kim & Tu 2023), exactly, by a chart pass whose
    cost does not grow with the split: O(n^2 NT S) per sentence rather than the O(n^3 NT S^2)
    anchored rules of the item pass, with no labeled span left out, so a model whose posteriors
    rule nothing out (thousands of symbols) decodes as well as a trained small one.

    The anchored rule posterior (Petrov & Klein 2007, section 3; every symbol its own coarse
    symbol) factors: q(A -> B C, i, k, j) = O(A, i, j) p(B | A, left) I(B, i, k) p(C | A,
    right) I(C, k, j) (O the outside score over Z). So the best score of a subtree with A over
    (i, j), its own incoming factor left out, is

        best(A, i, j) = O(A, i, j) max_k L(A, i, k) R(A, k, j),
        L(A, i, k) = max_B p(B | A, left) I(B, i, k) best(B, i, k),  R likewise on the right,

    with best(T, i, i+1) the word's label posterior, and the tree's score is max_A mu(A, 0, n)
    best(A, 0, n) (the top label's posterior). L and R are max-plus products of a span's
    vector with the factor matrices, once per span and side (`engine.maxplus.max_plus`), not
    once per split.
    Ties go to the first split, then the first child symbol, as in the item pass. Returns, per
    sentence, the labeled spans (start, end, symbol name; words included) and the log score,
    or None for a sentence without a parse. `factors`: `_IndependentFactors(rules, nt, dtype)`,
    made here when not given (a caller decoding many batches makes it once)."""
    B, N1, _, S = tables.marginals.shape
    dtype = tables.marginals.dtype

    def inside(i, w, x):         # log scores of the cells read, from the chart's scaled ones
        return engine.log_unscaled(tables.scaled_inside[:, i, w, x], tables.scale[:, i, w, None])

    def outside(i, w):
        return engine.log_unscaled(tables.scaled_outside[:, i, w], -tables.scale[:, i, w, None])

    N = N1 - 1
    factors = _IndependentFactors(rules, nt, dtype) if factors is None else factors
    # By width W, (B, N+1-W, NT) over the spans' starts: the best left-child and right-child
    # factor of each parent (its child is found again for the best trees: `child`), the best
    # split and the best score.
    lv: dict[int, Tensor] = {}
    rv: dict[int, Tensor] = {}
    split: dict[int, Tensor] = {}
    best: dict[int, Tensor] = {}
    child_of: dict[int, Tensor] = {}    # (B, N+1-W, K): log I + log best of each child symbol

    def children(W: int, child: Tensor) -> None:
        m = child.shape[1]
        child_of[W] = child
        flat = child.reshape(B * m, -1)
        sides = factors.words if W == 1 else factors.spans
        lv[W], rv[W] = (max_plus(flat, side).view(B, m, nt) for side in sides)

    def child(W: int, b: int, i: int, x: int, side: int) -> int:
        """The best child symbol of parent x on one side (0 left, 1 right) over the span of
        width W at i: the first column of the sums that gave lv or rv."""
        weights = (factors.words if W == 1 else factors.spans)[side].log[x]
        return int((child_of[W][b, i] + weights).argmax())

    if N >= 1:
        children(1, inside(slice(0, N), 1, slice(nt, S)) +
                 tables.marginals[:, :N, 1, nt:].log())
    for W in range(2, N + 1):
        m = N1 - W                                             # starts 0 .. N - W
        value = lv[1][:, :m] + rv[W - 1][:, 1:1 + m]
        at = torch.ones(value.shape, dtype=torch.long)
        for k in range(2, W):                                  # the first best split wins
            here = lv[k][:, :m] + rv[W - k][:, k:k + m]
            better = here > value
            value = torch.maximum(value, here)
            at.masked_fill_(better, k)
        best[W], split[W] = outside(slice(0, m), W) + value, at
        if W < N:
            children(W, inside(slice(0, m), W, slice(0, nt)) + best[W])
    n = list(lengths)
    top = torch.stack([best[n[b]][b, 0] if n[b] >= 2 else
                       torch.full((nt,), NEG_INF, dtype=dtype) for b in range(B)])
    rows, width = torch.arange(B), torch.tensor(n)
    top_value, top_symbol = (tables.marginals[rows, 0, width, :nt].log() + top).max(-1)
    word_value, word_symbol = (2 * tables.marginals[:, 0, 1, nt:].log()).max(-1)  # one word:
    # its label's posterior and the top label's
    one = width == 1
    top_value = torch.where(one, word_value, top_value)
    top_symbol = torch.where(one, word_symbol + nt, top_symbol)
    parsed = (torch.isfinite(tables.logz) & torch.isfinite(top_value)).tolist()
    values, symbol = top_value.tolist(), top_symbol.tolist()
    out: list = []
    for b in range(B):
        if not parsed[b]:
            out.append(None)
            continue
        spans, stack = [], [(0, n[b], symbol[b])]
        while stack:
            i, j, x = stack.pop()
            spans.append((i, j, symbols[x]))
            if j - i == 1:
                continue
            k = i + int(split[j - i][b, i, x])
            y, z = child(k - i, b, i, x, 0), child(j - k, b, k, x, 1)
            stack.append((k, j, z if j - k > 1 else nt + z))
            stack.append((i, k, y if k - i > 1 else nt + y))
        out.append((spans, values[b]))
    return out


FLOOR_SLACK = 1e-6  # nats below a known tree's score, for rounding (the floor stays exact)


def _slack(dtype: torch.dtype) -> float:
    """`FLOOR_SLACK` in float64; in a coarser dtype, room for its rounding (a score sums some
    tens of logarithms of some nats each: 1e4 units of the last place, 1.2e-3 in float32)."""
    return max(FLOOR_SLACK, 1e4 * torch.finfo(dtype).eps)
KNOWN_TREE_LABELS = 3  # coarse labels tried per span of the known tree (its best ones)
KNOWN_TREE_FROM = 1_000_000_000  # rule entries (subcategory triples of the anchored rules, over
                          # a batch: `_pass_costs`) the item pass would read under the floor
                          # per word, above which a known tree's floor is sought. Measured
                          # 2026-12-05 (one thread, refined Turkish grammars, batches of 32),
                          # when the pass read G**3 entries a rule: the floor per word alone was
                          # faster on every batch up to 0.53e9 such entries at G = 4 (sentences
                          # of up to 43 words) and 0.16e9 at G = 8; the known tree was 17-18%
                          # faster at 2.4e9 and 4.1e9 (G = 8, 28-43 words). Since the pass reads
                          # only each symbol's own subcategories, the two G = 8 batches read
                          # 0.016e9 and 0.026e9 entries (3.2 a rule), and the known tree no
                          # longer pays there (the 64 sentences: sought always 0.286 and 0.344
                          # s, two runs; never 0.281 and 0.303).
KNOWN_TREE_GAIN = 3       # ... when the item pass would cost at most this many times the chart
                          # pass under the floor per word


def _known_tree_floor(grammar: Grammar | None, tables: engine.SpanTables, lengths: Sequence[int],
                      lay: CoarseLayout, floor: Tensor, coarse_log: Tensor,
                      bound: Tensor | None = None, rows: Tensor | None = None) -> Tensor:
    """(B,) a floor that no sentence's best tree falls below: the score of one tree, the MBR
    bracketing (`mbr_spans_batch` over the span posteriors) under its best labeling by each
    span's `KNOWN_TREE_LABELS` most probable coarse labels (that reach `floor`), found by the
    item pass on those labeled spans alone, less `_slack`. Made for the sentences `rows`, or
    when not given for those with a finite floor; -inf for the others and for a sentence with
    no such labeling. `coarse_log` (B, N+1, N+1, K): log marginals of the coarse labels.

    The best tree scores at least as high as any one tree, so this floor, unlike the per-word
    one, needs no second pass; when the bracketing is close to the best tree it leaves out far
    more of the chart (under the tree bound, 3 to 12 times fewer anchored rules than the
    per-word floor on the refined Turkish grammars of README's "Parsing against training
    speed"; six times fewer on `bench_parse_speed.py`'s EM-trained grammars under the looser
    bound before it)."""
    B = len(lengths)
    known = torch.full((B,), NEG_INF, dtype=floor.dtype)
    if rows is None:
        rows = torch.isfinite(floor).nonzero().flatten()
    if not len(rows):
        return known
    sub = tables.rows(rows)
    sub_lengths = [lengths[b] for b in rows.tolist()]
    K, Kp = lay.slots.shape[0], lay.num_parents
    at = [(b, i, j - i) for b, spans in
          enumerate(mbr_spans_batch(_span_posteriors(sub.marginals, lay.nt), sub_lengths))
          for i, j in spans]
    sub_log = _rows(coarse_log, rows)                                    # (rows, N+1, N+1, K)
    within = torch.zeros(sub_log.shape, dtype=torch.bool)
    top = sub_log[:, :, 1].topk(min(KNOWN_TREE_LABELS, K), -1).indices
    within[:, :, 1].scatter_(-1, top, True)
    if at:  # the best coarse parents of the bracketing's spans alone (a top-k per cell is slow)
        sb, si, sw = torch.tensor(at).t()
        top = sub_log[sb, si, sw, :Kp].topk(min(KNOWN_TREE_LABELS, Kp), -1).indices
        within[sb[:, None], si[:, None], sw[:, None], top] = True
    _, value = _max_rule_product_items(grammar, sub, sub_lengths, lay, floor[rows], within,
                                       sub_log, _rows(bound, rows))
    known[rows] = value - _slack(value.dtype)
    return known


# The item pass's cost, in units of the chart pass's multiply-adds: ITEM_OVERHEAD an anchored
# rule and ITEM_PER_ENTRY a subcategory triple it reads (`_item_work`; G**3 of them a rule where
# every symbol has G subcategories). Measured on the 2-core development machine (one thread,
# float64, 2026-12-05, since the pass is a compiled loop: `engine.anchored`), on a refined
# Turkish grammar (G = 4, 20 coarse parents), the refined demo grammar (G = 4), EM-trained
# random grammars of 20/30 (G = 2) and 30/60 symbols (G = 1) and the Turkish token grammar
# (G = 1): an anchored rule took 31-70 ns on batches of over 100,000 (plus about 3 ms a call),
# a chart multiply-add 0.3-1.3 ns (a max-add of the unrefined pass 0.5-0.8 ns a
# `VITERBI_UNIT`): 45-230 units a rule, nearer 50 where G is small.
ITEM_OVERHEAD = 50
ITEM_PER_ENTRY = 1
REFINED_CHART_ROWS = 16  # sentences per call of the refined chart pass (at 32 it ran 5-25%
                         # slower on the random benchmark grammars, whose posteriors keep all)
ITEMS_AT_ONCE = 2 ** 20  # anchored rules per call of the item pass on factored rules, which
                         # lists them (about 100 bytes each); a rule tensor needs no list
FACTORED_RULES_AT_MOST = 2 ** 24  # of one sentence, for factored rules (no chart pass)


def _max_rule_product_floored(grammar: Grammar | None, tables: engine.SpanTables,
                              lengths: Sequence[int], lay: CoarseLayout, floor: Tensor,
                              coarse_log: Tensor, bound: Tensor | None = None,
                              known: tuple[Tensor, Tensor, Tensor] | None = None
                              ) -> tuple[list[tuple[list[tuple[int, int, str]], float] | None],
                                         Tensor, Tensor]:
    """`_max_rule_product_refined` with the floor `floor` (B,), by whichever exact pass costs
    less: the item pass (`_max_rule_product_items`) for the sentences with a finite floor when
    its work over their anchored rules (`_item_work`) comes to no more than the chart pass's
    work over their kept (span, coarse parent) pairs; the chart pass otherwise, and for the
    sentences without a floor. One choice for the batch: the chart pass runs span width by
    span width over every sentence it is given, so a part of a batch costs it nearly as much
    as the whole. Both give the same trees and scores (up to rounding). The
    item pass takes its sentences together, on factored rules in groups of at most
    `ITEMS_AT_ONCE` anchored rules (a sentence with more goes alone). `known`: the
    `_kept_labels` under this floor and their `_pass_costs`, when the caller has them. Returns
    the results, the (B,) best log scores and the floors the passes held (-inf where the pass
    left nothing out: the max-semiring pass of an unrefined grammar)."""
    B = len(lengths)
    dtype = tables.marginals.dtype
    K, G = lay.slots.shape
    n = torch.tensor(list(lengths), dtype=torch.long)
    bound = coarse_log if bound is None else bound
    if known is None:
        kept = _kept_labels(bound, n, lay.num_parents, floor)
        rules, entries, chart = _pass_costs(kept, lay, n)
    else:
        kept, rules, entries, chart = known
    finite = torch.isfinite(floor)
    by_items = finite & (_item_work(int(rules[finite].sum()), int(entries[finite].sum()))
                         <= int(chart[finite].sum())
                         or lay.factored)               # factored rules: no chart pass
    if not lay.chart_fits:      # no chart layout: every sentence by items, under its floor or
        by_items[:] = True      # none (exact either way; with none it keeps every label)
    if lay.factored and bool((rules > FACTORED_RULES_AT_MOST).any()):
        b = int((rules > FACTORED_RULES_AT_MOST).nonzero()[0, 0])
        raise InputError(
            f"max-rule-product through factored rules: the posteriors of a sentence of "
            f"{lengths[b]} words leave {int(rules[b]):,} anchored rules to weigh (at most "
            f"{FACTORED_RULES_AT_MOST:,} are taken, about 100 bytes each): the rules are too "
            f"flat for this decoder, which has no pass over the whole chart for them; decode "
            f"with mbr")
    results: list = [None] * B
    values = torch.full((B,), NEG_INF, dtype=dtype)
    groups = []
    rows = (~by_items).nonzero().flatten()
    if len(rows):
        chart_pass = _chart_pass(lay)
        step = len(rows)
        if chart_pass is _max_rule_product_refined:   # shortest first, in fewer rows a call
            rows, step = rows[n[rows].argsort(stable=True)], REFINED_CHART_ROWS
        groups += [(chart_pass, rows[r0:r0 + step]) for r0 in range(0, len(rows), step)]
    rows = by_items.nonzero().flatten().tolist()
    counts = rules.tolist()
    at_once = ITEMS_AT_ONCE if lay.factored else math.inf
    while rows:
        total, end = counts[rows[0]], 1
        while end < len(rows) and total + counts[rows[end]] <= at_once:
            total += counts[rows[end]]
            end += 1
        groups.append((_max_rule_product_items, torch.tensor(rows[:end])))
        rows = rows[end:]
    held = floor.clone()
    for run, rows in groups:
        extra = {"kept": _rows(kept, rows)} if run is _max_rule_product_items else {}
        sub = [lengths[b] for b in rows.tolist()]
        # The chart pass works over every cell of its rows' chart: none past their longest.
        cut = max(sub) + 1 if run is _max_rule_product_refined else None
        found, value = run(grammar, tables.rows(rows).trimmed(cut), sub,
                           lay, floor[rows], coarse_log=_rows(coarse_log, rows)[:, :cut, :cut],
                           bound=_rows(bound, rows)[:, :cut, :cut], **extra)
        values[rows] = value
        if G == 1 and run is not _max_rule_product_items:
            held[rows] = NEG_INF
        for b, result in zip(rows.tolist(), found):
            results[b] = result
    return results, values, held


def _rows(x: Tensor | None, rows: Tensor) -> Tensor | None:
    """x[rows], or x itself when `rows` is every row in order (no copy of a chart-sized
    table)."""
    return x if x is None or engine.every_row(rows, x.shape[0]) else x[rows]


def _item_work(rules: int, entries: int) -> int:
    """The item pass's cost over `rules` anchored rules that read `entries` subcategory
    triples (`_pass_costs`), in the chart pass's multiply-adds."""
    return ITEM_OVERHEAD * rules + ITEM_PER_ENTRY * entries


def _chart_pass(lay: CoarseLayout) -> Callable:
    """The pass over the whole chart: `_max_rule_product_refined`, or on an unrefined grammar
    `_max_rule_product_unrefined` (which takes no floor: it leaves nothing out)."""
    if lay.slots.shape[1] > 1:
        return _max_rule_product_refined

    def unrefined(grammar, tables, lengths, lay, floor, coarse_log=None, bound=None):
        results = _max_rule_product_unrefined(grammar, tables, lengths, lay)
        return results, torch.tensor([NEG_INF if r is None else r[1] for r in results],
                                     dtype=tables.marginals.dtype)
    return unrefined


def _splits(widths: Tensor) -> tuple[Tensor, Tensor]:
    """For spans of the given widths, every split: (which span, split point u), u = 1 .. w-1,
    span by span."""
    count = (widths - 1).clamp(min=0)
    of = torch.repeat_interleave(torch.arange(len(widths)), count)
    return of, torch.arange(len(of)) - (count.cumsum(0) - count)[of] + 1


def _pass_costs(kept: Tensor, lay: CoarseLayout, lengths: Tensor
                ) -> tuple[Tensor, Tensor, Tensor]:
    """Per sentence, the number of anchored coarse rules among the kept labeled spans `kept`
    (B, N+1, N+1, K) (the item pass's work: parent, split, left and right child all kept), the
    subcategory triples the item pass reads over them (per rule, the parent's nonterminal
    subcategories times each child's subcategories: `CoarseLayout.counts`), and the chart
    pass's cost in multiply-adds of the refined chart pass: over the kept (span,
    coarse parent) pairs, its folding of the outside, G**3 K**2, and its sums over
    subcategories, K**2 G (G + 1) a split; on an unrefined grammar (G = 1), which takes no
    floor, the max-semiring pass over the whole chart (`_viterbi_cost`)."""
    K, G = lay.slots.shape
    B = kept.shape[0]
    kp = lay.num_parents
    cell_count = kept.sum(-1)                                            # (B, N+1, N+1)
    parent_count = kept[..., :kp].sum(-1)
    parent_count[:, :, :2] = 0
    counts, parent_counts = lay.counts
    cell_subs = (kept * counts).sum(-1)        # the kept labels' subcategories, per cell
    parent_subs = (kept[..., :kp] * parent_counts[:kp]).sum(-1)
    cb, ci, cw = parent_count.nonzero().unbind(1)
    of, u = _splits(cw)
    b, i, w = cb[of], ci[of], cw[of]
    pairs = cell_count[b, i, u] * cell_count[b, i + u, w - u] * parent_count[b, i, w]
    rules = torch.zeros(B, dtype=torch.long).index_add(0, b, pairs)
    triples = cell_subs[b, i, u] * cell_subs[b, i + u, w - u] * parent_subs[b, i, w]
    entries = torch.zeros(B, dtype=torch.long).index_add(0, b, triples)
    if G == 1:
        return rules, entries, _viterbi_cost(lengths, lay)
    per_pair = G ** 3 * K ** 2 + (cw - 1) * K ** 2 * G * (G + 1)
    chart = torch.zeros(B, dtype=torch.long).index_add(0, cb, parent_count[cb, ci, cw] * per_pair)
    return rules, entries, chart


# The max-semiring pass's cost per max-add (`_viterbi_cost`), in multiply-adds of the refined
# chart pass. Measured on the 2-core development machine (one thread, float64, 2026-12-05):
# 0.2-0.4 ns a max-add on unrefined grammars of 20/30 to 60/120 symbols with the compiled
# max-plus loop, about 0.2 ns since the whole forward is compiled, against 0.3-0.7 ns for the
# refined pass's multiply-adds (`ITEM_OVERHEAD`). Kept at 0.5: at 60/120 the pruning it
# chooses still won (`UNREFINED_PRUNE_FROM`).
VITERBI_UNIT = 0.5


def _viterbi_cost(lengths: Tensor, lay: CoarseLayout) -> Tensor:
    """(B,) the cost of `engine.viterbi` over whole sentences of these lengths, in multiply-adds
    of the refined chart pass (`VITERBI_UNIT` each): per span of width w, the best split of
    each pair of nonterminal children, (w - 1) NT**2, and the rules over those pairs, NT**3;
    per word, the blocks with a word child, 2 NT S T (S = NT + T symbols). Summed over the
    spans: NT**3 n(n-1)/2 + NT**2 (n**3 - n)/6."""
    nt, s = lay.num_parents, lay.slots.shape[0]
    n = lengths.to(torch.float64)
    count = nt ** 3 * n * (n - 1) / 2 + nt ** 2 * (n ** 3 - n) / 6 + 2 * nt * s * (s - nt) * n
    return (VITERBI_UNIT * count).round().to(torch.long)


def _work_items(parent_log_mu: Tensor, floor: Tensor | None
                ) -> list[tuple[Tensor, Tensor | None]]:
    """The work of one width of `_max_rule_product_refined`: (rows, None), whole rows with every
    coarse parent (the sentences without a floor), and (rows, parents), single (row, coarse
    parent) pairs whose log marginal reaches their sentence's floor, grouped by parent.
    parent_log_mu (B, P, Kp); rows count (sentence, start) pairs, sentence-major."""
    B, P, Kp = parent_log_mu.shape
    if floor is None:
        return [(torch.arange(B * P), None)]
    open_ = torch.isneginf(floor)                                        # (B,) no floor
    whole = open_.repeat_interleave(P).nonzero().flatten()               # rows of those
    keep = (parent_log_mu >= floor[:, None, None]) & ~open_[:, None, None]
    pairs = keep.view(B * P, Kp).t().nonzero()                           # (m, 2) parent, row
    return [(whole, None), (pairs[:, 1], pairs[:, 0])]


def _max_rule_product_refined(grammar: Grammar, tables: engine.SpanTables,
                              lengths: Sequence[int], lay: CoarseLayout, floor: Tensor | None,
                              coarse_log: Tensor | None = None, bound: Tensor | None = None
                              ) -> tuple[list[tuple[list[tuple[int, int, str]], float] | None],
                                         Tensor]:
    """`max_rule_product` on a refined grammar over the labeled spans `floor` keeps: with
    `floor` (B,) (log, per sentence), a coarse parent over a span of two or more words whose log
    marginal is below its sentence's floor is left out (no tree found uses it; -inf keeps
    everything). Returns the results and the (B,) best log scores found (-inf for a sentence
    with no tree left). `coarse_log` (B, N+1, N+1, K), the log marginals of the coarse labels,
    is made here when not given. `bound` (B, N+1, N+1, K), what the floor is held against:
    `_tree_bound` of `coarse_log`, or `coarse_log` itself when not given (both exact).

    One width at a time, every span of every sentence together. The best score of a child cell
    for coarse symbol y multiplies each of its subcategories' inside scores, so that a parent's
    best over (split, y, z) is a max over the sums
    s(x, y, z) = sum_{a,b,c} O(x_a) p(x_a -> y_b z_c) L(y_b) R(z_c) with L = I e^best of the
    left child, R of the right one. These are taken out of log space per cell (divided by the
    cell's largest; the parent's outside per coarse parent), and a compiled loop per width
    (`engine.anchored.best_splits`) folds the parent's outside into its rules once per span and
    takes the sums and their maxima over (y, z) split by split; only the maxima, one per split
    and parent, go back to log space, with each cell's log maximum. A child of width two or
    more can only be a coarse parent, so only the word children at a span's edges range over
    every coarse symbol. On an unrefined grammar (G = 1) this is a max-semiring pass
    (`_max_rule_product_unrefined`). Ties go to the first split, then the first (left, right)
    pair. Shapes: rows = (sentence, start) pairs of one width, K coarse symbols, Kp coarse
    parents, G subcategory slots.
    """
    dtype = tables.marginals.dtype
    K, G = lay.slots.shape
    Kp = lay.num_parents
    B, N1, _, S = tables.marginals.shape
    N = N1 - 1
    nt = len(grammar.nonterminals)
    if coarse_log is None:
        coarse_log = lay.coarse_log(tables.marginals)              # (B, N+1, N+1, K)
    bound = coarse_log if bound is None else bound
    best = torch.full((B, N1, N1, K), NEG_INF, dtype=dtype)
    best[:, :, 1] = coarse_log[:, :, 1]
    back = torch.zeros(B, N1, N1, max(Kp, 1), 3, dtype=torch.long)      # split, left, right
    pad = torch.full((B, N1, N1, S + 1 - nt), NEG_INF, dtype=dtype)
    outside = torch.cat([tables.outside, pad], -1)[..., lay.slots[:Kp]]  # (B, N+1, N+1, Kp, G)
    inside = torch.cat([tables.inside, pad[..., :1]], -1)[..., lay.slots.t()]  # (.., G, K)
    # Each cell's inside scores times e^best of their coarse symbol, scaled: (B, N+1, N+1, G, K)
    # (slot-major, so that the products below run over a contiguous coarse axis) and the log
    # scale (B, N+1, N+1).
    child = torch.zeros(B, N1, N1, G, K, dtype=dtype)
    child_scale = torch.zeros(B, N1, N1, dtype=dtype)
    child[:, :, 1], child_scale[:, :, 1] = _shifted(inside[:, :, 1] + best[:, :, 1, None], 2)
    for w in range(2, N + 1):
        P = N - w + 1
        rows_all = B * P
        parent, m_par = _shifted(outside[:, 0:P, w])                    # (B, P, Kp, G), (B, P, Kp)
        parent = parent.view(rows_all, Kp, G)
        value = torch.full((rows_all, Kp), NEG_INF, dtype=dtype)
        arg = torch.zeros(rows_all, Kp, 3, dtype=torch.long)
        for rows, parents in _work_items(bound[:, 0:P, w, :Kp], floor):
            # rows (m,) of this width's (sentence, start) pairs; parents (m,) the one coarse
            # parent of each, or None for every parent of each row.
            anchored.best_splits(lay.rules, parent, child, child_scale, rows, parents, w,
                                 Kp, value, arg)
        best[:, 0:P, w, :Kp] = value.view(B, P, Kp) + m_par
        back[:, 0:P, w, :Kp] = arg.view(B, P, Kp, 3)
        child[:, 0:P, w], child_scale[:, 0:P, w] = _shifted(
            inside[:, 0:P, w] + best[:, 0:P, w, None], 2)
    n = torch.tensor(list(lengths), dtype=torch.long)
    every = torch.arange(B)
    top_scores = best[every, 0, n] + coarse_log[every, 0, n]             # (B, K)
    top_value, top = top_scores.max(-1)
    # A sentence with no parse, or none left by the floor, has no tree to follow.
    parsed = torch.isfinite(tables.logz) & torch.isfinite(top_value)
    # Follow the back pointers of every sentence together, one tree level at a time.
    found = []
    b, i, w, x = every[parsed], torch.zeros(int(parsed.sum()), dtype=torch.long), \
        n[parsed], top[parsed]
    while len(b):
        found.append(torch.stack([b, i, w, x], -1))
        inner = w > 1
        b, i, w, x = b[inner], i[inner], w[inner], x[inner]
        u, y, z = back[b, i, w, x].unbind(-1)
        b, i, w, x = torch.cat([b, b]), torch.cat([i, i + u]), torch.cat([u, w - u]), \
            torch.cat([y, z])
    spans: list[list[tuple[int, int, str]]] = [[] for _ in range(B)]
    names = lay.names
    for sb, si, sw, sx in (torch.cat(found).tolist() if found else []):
        spans[sb].append((si, si + sw, names[sx]))
    values = top_value.tolist()
    return [(spans[k], values[k]) if ok else None for k, ok in enumerate(parsed.tolist())], \
        top_value.masked_fill(~parsed, NEG_INF)


def _rescaled(table: Tensor, b: Tensor, i: Tensor, w: Tensor, log_scale: Tensor,
              slots: Tensor) -> tuple[Tensor, Tensor]:
    """The scaled scores of the cells (b, i, w) of `table` (B, N+1, N+1, C) at each cell's
    subcategory `slots` (rows, G) (C and up: none, zero), divided by their maximum, and the
    log of that maximum plus the cell's `log_scale` (0 where every entry is zero): the scores
    out of the chart's scale, as `_shifted` gives them from log scores. Only the G entries of
    each cell are read."""
    C = table.shape[-1]
    picked = table[b[:, None], i[:, None], w[:, None], slots.clamp(max=C - 1)]  # (rows, G)
    picked = picked.masked_fill(slots >= C, 0.0)
    top = picked.amax(1)
    some = top > 0
    return picked / torch.where(some, top, 1.0)[:, None], \
        torch.where(some, top.log() + log_scale, 0.0)


def _kept_labels(coarse_log: Tensor, lengths: Tensor, num_parents: int, floor: Tensor
                 ) -> Tensor:
    """(B, N+1, N+1, K) the labeled spans that reach their sentence's floor: any coarse symbol
    over a word, a coarse parent over a span of two or more words, within the sentence. Under a
    floor of -inf, the labels that some tree of nonzero score can hold (a finite bound)."""
    B, N1, _, K = coarse_log.shape
    start, width = torch.arange(N1)[:, None], torch.arange(N1)[None, :]
    inside = (width >= 1) & (start + width <= lengths[:, None, None])    # (B, N+1, N+1)
    symbol = torch.arange(K)
    allowed = (width[..., None] == 1) | (symbol < num_parents)          # (1, N+1, K)
    return (coarse_log >= floor[:, None, None, None]) & torch.isfinite(coarse_log) & \
        inside[..., None] & allowed


def _max_rule_product_items(grammar: Grammar | None, tables: engine.SpanTables,
                            lengths: Sequence[int], lay: CoarseLayout, floor: Tensor,
                            within: Tensor | None = None, coarse_log: Tensor | None = None,
                            bound: Tensor | None = None, kept: Tensor | None = None
                            ) -> tuple[list[tuple[list[tuple[int, int, str]], float] | None],
                                       Tensor]:
    """`max_rule_product` over the labeled spans a finite floor keeps, item by item, on any
    grammar (G = 1 included): the same objective, trees and scores as
    `_max_rule_product_refined` with that floor, for a cost that follows the kept labeled spans
    rather than the chart.

    Every factor of a tree's score is at most 1, so the score is at most each factor; a word's
    label posterior is a factor and a rule's posterior is at most its parent's label marginal.
    A tree that holds a labeled span (words included) with log marginal below the floor
    therefore scores below it, and leaving every such span out loses no tree that reaches the
    floor. What is left of a trained grammar's chart is a few labels per span (items).

    Over the anchored coarse rules among the items (parent item, split, left item, right item),
    with log q(x -> y z, i, k, j) = log sum_{a,b,c} O(x_a) p(x_a -> y_b z_c) I(y_b) I(z_c)
    (Petrov & Klein 2007, section 3; O is the outside score over Z), best(item) = max over its
    anchored rules of log q + best(left) + best(right), narrow items first: one compiled loop
    over the rules that reads the fine rules in place (`engine.anchored.best_derivations`;
    factored rules, which have no rule tensor, list their rules and compute log q first). Ties go
    to the first split, then the first (left, right) pair, as in `_max_rule_product_refined`.
    Returns the results and the (B,) best log scores (-inf where no tree reaches the floor).
    `within` (B, N+1, N+1, K) bool, when given, keeps the labeled spans it marks only: the best
    tree among those that use no other. `coarse_log` and `bound` as in
    `_max_rule_product_refined`; `kept`, when given, is `_kept_labels` of them (made here
    otherwise).
    """
    dtype = tables.marginals.dtype
    K, G = lay.slots.shape
    Kp = lay.num_parents
    B, N1, _, S = tables.marginals.shape
    n = torch.tensor(list(lengths), dtype=torch.long)
    if coarse_log is None:
        coarse_log = lay.coarse_log(tables.marginals)              # (B, N+1, N+1, K)
    if kept is None:
        kept = _kept_labels(coarse_log if bound is None else bound, n, Kp, floor)
    if within is not None:
        kept = kept & within
    # Items in (sentence, start, width, symbol) order: each cell's items are contiguous and in
    # symbol order.
    cell_count = kept.sum(-1)                                            # (B, N+1, N+1)
    cell_first = cell_count.flatten().cumsum(0).view(B, N1, N1) - cell_count
    ib, ii, iw, ik = kept.nonzero().unbind(1)
    label_log = coarse_log[ib, ii, iw, ik]                              # each item's log mu
    best = label_log.masked_fill(iw > 1, NEG_INF)                        # words: their label
    # Each item's inside scores over its subcategory slots (index S: none), out of log space
    # per item.
    inside_hat, inside_max = _rescaled(tables.scaled_inside, ib, ii, iw,
                                       tables.scale[ib, ii, iw], lay.slots[ik])  # (items, G)
    # Parent items, by width (a parent's children are narrower: their best is final when it is
    # read).
    parents = (iw > 1).nonzero().flatten()
    parents = parents[iw[parents].argsort(stable=True)]
    pw = iw[parents]
    pb, pi = ib[parents], ii[parents]
    outside_hat, outside_max = _rescaled(tables.scaled_outside, pb, pi, pw,
                                         -tables.scale[pb, pi, pw],
                                         lay.slots[ik[parents]])         # (parents, G)
    # Factored rules have no rule tensor: the posteriors of their anchored rules are computed
    # here, in the order the compiled pass takes them (`_factored_log_q`).
    log_q = None if not lay.factored else \
        _factored_log_q(lay, ik, parents, cell_first, cell_count, ib, ii, pw, inside_hat,
                        inside_max, outside_hat, outside_max)
    back = anchored.best_derivations(lay.binary, lay.slots, outside_hat, outside_max,
                                     inside_hat, inside_max, label_log, ib, ii, iw, ik,
                                     cell_first, cell_count, parents, best, log_q,
                                     _slack(dtype))                      # (items, 2)
    # The top label: its posterior closes the score; first best symbol of the whole span.
    root = (ii == 0) & (iw == n[ib])
    root_items = root.nonzero().flatten()
    of_root = ib[root_items]
    root_score = best[root_items] + coarse_log[of_root, 0, n[of_root], ik[root_items]]
    top_value = torch.full((B,), NEG_INF, dtype=dtype).scatter_reduce(
        0, of_root, root_score, "amax")
    top_item = torch.full((B,), len(ib), dtype=torch.long).scatter_reduce(
        0, of_root, torch.where(root_score == top_value[of_root], root_items, len(ib)), "amin")
    parsed = torch.isfinite(tables.logz) & torch.isfinite(top_value)
    # Follow the back pointers of every sentence together, one tree level at a time.
    found = []
    item = top_item[parsed]
    while len(item):
        found.append(item)
        item = item[iw[item] > 1]
        item = torch.cat([back[item, 0], back[item, 1]])
    spans: list[list[tuple[int, int, str]]] = [[] for _ in range(B)]
    if found:
        item = torch.cat(found)
        item = item[ib[item].argsort(stable=True)]   # by sentence, each in the order found
        names = lay.names
        listed = list(zip(ii[item].tolist(), (ii[item] + iw[item]).tolist(),
                          [names[x] for x in ik[item].tolist()]))
        at = 0
        for sb, count in enumerate(torch.bincount(ib[item], minlength=B).tolist()):
            spans[sb] = listed[at:at + count]
            at += count
    values = top_value.tolist()
    return [(spans[k], values[k]) if ok else None for k, ok in enumerate(parsed.tolist())], \
        top_value.masked_fill(~parsed, NEG_INF)


def _factored_log_q(lay: CoarseLayout, ik: Tensor, parents: Tensor, cell_first: Tensor,
                    cell_count: Tensor, ib: Tensor, ii: Tensor, pw: Tensor, inside_hat: Tensor,
                    inside_max: Tensor, outside_hat: Tensor, outside_max: Tensor) -> Tensor:
    """For `_max_rule_product_items` on factored rules (no rule tensor; every symbol its own
    coarse symbol, G = 1): log q of every anchored rule among the items, in the order
    `anchored.best_derivations` takes them (parent item as `parents` orders them, split, left
    item, right item), in chunks of `MRP_CHUNK`."""
    of_split, u = _splits(pw)
    sb, si, sw = ib[parents][of_split], ii[parents][of_split], pw[of_split]
    left_first, left_n = cell_first[sb, si, u], cell_count[sb, si, u]
    right_first, right_n = cell_first[sb, si + u, sw - u], cell_count[sb, si + u, sw - u]
    pairs = left_n * right_n
    of_rule = torch.repeat_interleave(torch.arange(len(pairs)), pairs)
    t = torch.arange(len(of_rule)) - (pairs.cumsum(0) - pairs)[of_rule]
    rn = right_n[of_rule]
    left = left_first[of_rule] + t.div(rn, rounding_mode="floor")
    right = right_first[of_rule] + t.remainder(rn)
    rule_parent = of_split[of_rule]                                      # index into `parents`
    pitem = parents[rule_parent]
    log_q = torch.empty(len(of_rule), dtype=inside_hat.dtype)
    for r0 in range(0, len(of_rule), MRP_CHUNK):
        sl = slice(r0, r0 + MRP_CHUNK)
        rp, rl, rr = rule_parent[sl], left[sl], right[sl]
        rule = lay.binary_logprob(ik[pitem[sl]], ik[rl], ik[rr]).exp()
        total = inside_hat[rl, 0] * (outside_hat[rp, 0] * rule * inside_hat[rr, 0])
        log_q[sl] = total.log() + outside_max[rp] + inside_max[rl] + inside_max[rr]
    return log_q


def _max_rule_product_unrefined(grammar: Grammar, tables: engine.SpanTables,
                                lengths: Sequence[int], lay: CoarseLayout
                                ) -> list[tuple[list[tuple[int, int, str]], float] | None]:
    """`max_rule_product` when every coarse symbol has one subcategory (an unrefined grammar):
    the engine's max-semiring pass (`engine.viterbi`) with each symbol's log marginal over each
    span as a potential.

    With one symbol per coarse symbol, q(x -> y z, i, k, j) = O(x) p(x -> y z) I(y) I(z), so
    with c(x, span) = log I(x, span) + best(x, span) the recursion of `max_rule_product` is
    c(x, span) = log mu(x, span) + max over (k, y, z) of log p(x -> y z) + c(y) + c(z), mu the
    label marginal (I O over Z): a Viterbi pass over the rules with the word scores
    log I + log mu and the potential log mu on every wider span; the root's outside,
    log p(root x) - log Z, closes it. Max over splits before rules, as in any Viterbi pass, so
    it costs about what an inside pass costs rather than one rule product per split. Exact
    ties are broken as `engine.viterbi` breaks them (the blocks of two nonterminal children
    before those with a word), not by the first split.
    """
    nt = len(grammar.nonterminals)
    B, N1, _, _ = tables.marginals.shape
    N = N1 - 1
    # The logarithms read: every symbol's over each word here, the nonterminals' over the
    # sentences' wider spans in the pass (`span_prob`: most of the table is never read).
    words = engine.log_unscaled(tables.scaled_inside[:, :N, 1], tables.scale[:, :N, 1, None]) \
        + tables.marginals[:, :N, 1].log()                               # (B, N, S)
    logz = tables.logz.masked_fill(~torch.isfinite(tables.logz), 0.0)
    root = grammar.root.to(words.dtype)[None, :] - logz[:, None]         # (B, NT)
    # A grammar whose nonterminals emit words scores them at width one too.
    nt_words = words[..., :nt] if grammar.nonterminals_emit else None
    results = engine.viterbi(root, grammar.binary.to(words.dtype), words[..., nt:],
                             torch.tensor(list(lengths)), nt_words,
                             span_prob=tables.marginals)
    names = [lay.names[k] for k in lay.member.argmax(1).tolist()]        # per fine symbol
    parsed = torch.isfinite(tables.logz).tolist()
    return [None if res is None or not ok else
            ([(i, j, names[x]) for i, j, x in res[1]], res[0])
            for res, ok in zip(results, parsed)]


def tree_logprob_summed(grammar: Grammar, tree: Tree) -> float:
    """log of the summed probability of every fine tree whose labels map onto `tree`'s labels
    by `coarse_name` (for an unrefined grammar: log p(tree) itself). Nodes must be binary or
    preterminals; unknown labels or words give -inf. One tree of `TreeScorer.logprobs`."""
    return TreeScorer(grammar).logprobs([tree])[0]


TREE_CHUNK = 2 ** 22  # elements of the largest temporary per chunk of nodes


class TreeScorer:
    """log p(tree, sentence) summed over the refinements of each tree's labels, for a batch of
    trees under one grammar: an inside pass restricted to each tree's own nodes.

    A label stands for the symbols named by it or whose `coarse_name` it is (one symbol for an
    unrefined grammar or a fine label). Every label of a batch gets G slots, the symbols it
    stands for padded with a symbol of probability zero, so that a binary node's inside scores
    over its parent's slots, (G,), are one log-sum over the rule block
    binary[parent slots, left slots, right slots], (G, G, G), plus its children's scores. The
    nodes of all trees are scored together, one tree height at a time (a node's children are
    lower), so there is no walk per node or per sentence over the grammar's tensors. Float64
    log space throughout: the work is about G^3 per node, small beside the span tables. When
    every label of a batch stands for one symbol (G = 1: an unrefined grammar, or the `mbr`
    decoder's fine labels) the tree's log probability is the sum of its rules', gathered for
    all nodes at once.
    """

    def __init__(self, grammar: Grammar):
        dtype = torch.float64
        nt, s = len(grammar.nonterminals), grammar.num_symbols
        self.grammar, self.nt, self.s = grammar, nt, s
        self.index = {name: k for k, name in enumerate(grammar.symbols)}
        self.by_coarse: dict[str, list[int]] = {}
        for k, name in enumerate(grammar.symbols):
            self.by_coarse.setdefault(coarse_name(name), []).append(k)
        # Index NT (parents) or S (children, words) is the padding symbol: probability zero.
        self.binary = torch.full((nt + 1, s + 1, s + 1), NEG_INF, dtype=dtype)
        self.binary[:nt, :s, :s] = grammar.binary.to(dtype)
        self.root = torch.cat([grammar.root.to(dtype), torch.full((1,), NEG_INF, dtype=dtype)])
        v = grammar.lexical.shape[1]
        # Column V is an unknown word's (id -1): no symbol emits it.
        self.lexical = torch.full((s + 1, v + 1), NEG_INF, dtype=dtype)
        self.lexical[:s, :v] = grammar.lexical.to(dtype)

    def symbols_of(self, label: str) -> list[int]:
        """The symbols a label stands for: its own name and the subcategories it is coarse of."""
        found = set(self.by_coarse.get(label, ()))
        if label in self.index:
            found.add(self.index[label])
        return sorted(found)

    def logprobs(self, trees: Sequence[Tree]) -> list[float]:
        """One summed log probability per tree (-inf when the grammar cannot build it).
        ValueError for a node that is neither binary nor a preterminal."""
        for tree in trees:
            for node in tree.subtrees():
                if not (node.is_preterminal() or len(node.children) == 2
                        and all(isinstance(c, Tree) for c in node.children)):
                    raise ValueError(f"node {node.label} is neither binary nor a preterminal")
        return self.logprobs_of_spans([t.leaves() for t in trees],
                                      [t.labeled_spans() for t in trees])

    def logprobs_of_spans(self, sentences: Sequence[Sequence[str]],
                          spans: Sequence[Sequence[tuple[int, int, str]]]) -> list[float]:
        """`logprobs` of binary trees given as their labeled spans (start, end, label), words
        included, as the decoders make them (`tree_from_spans` of them is the tree)."""
        B = len(sentences)
        if B == 0:
            return []
        N = max(map(len, sentences))
        labels: dict[str, int] = {}
        rows, starts, widths, label_ids, word_ids = [], [], [], [], []
        for b, (words, tree_spans) in enumerate(zip(sentences, spans)):
            for i, j, label in tree_spans:
                rows.append(b)
                starts.append(i)
                widths.append(j - i)
                label_ids.append(labels.setdefault(label, len(labels)))
            word_ids.append([self.grammar.vocab.lookup(w) for w in words] + [-1] * (N - len(words)))
        sets = [self.symbols_of(name) for name in labels]
        G = max(1, max(map(len, sets)))
        slots = torch.full((len(sets) + 1, G), self.s, dtype=torch.long)  # (L + 1, G), L: none
        for k, found in enumerate(sets):
            slots[k, :len(found)] = torch.tensor(found, dtype=torch.long)
        parent_slots = slots.masked_fill(slots >= self.nt, self.nt)      # nonterminals only
        # label[b, i, w]: the label of the tree's node over span (i, i+w), L where none.
        label = torch.full((B, N + 1, N + 1), len(sets), dtype=torch.long)
        label[rows, starts, widths] = torch.tensor(label_ids, dtype=torch.long)
        in_tree = label < len(sets)
        # The left child of node (i, w) is the tree's widest node (i, u) with u < w.
        widest = torch.where(in_tree, torch.arange(N + 1), 0).cummax(-1).values  # (B, N+1, N+1)
        ids = torch.tensor(word_ids, dtype=torch.long)                   # (B, N)
        ids = ids.masked_fill(ids < 0, self.lexical.shape[1] - 1)
        every = torch.arange(B)
        n = torch.tensor([len(words) for words in sentences])
        if G == 1:
            # Every label is one symbol: the tree's log probability is the sum of its rules'.
            b, i, w = (in_tree & (torch.arange(N + 1) >= 2)).nonzero().unbind(1)
            u = widest[b, i, w - 1]
            rules = self.binary[parent_slots[label[b, i, w], 0], slots[label[b, i, u], 0],
                                slots[label[b, i + u, w - u], 0]]
            words = self.lexical[slots[label[:, :N, 1], 0], ids]         # (B, N)
            words = words.masked_fill(torch.arange(N) >= n[:, None], 0.0)
            total = self.root[parent_slots[label[every, 0, n], 0]] + words.sum(-1)
            return total.index_add(0, b, rules).tolist()
        scores = torch.full((B, N + 1, N + 1, G), NEG_INF, dtype=torch.float64)  # log inside
        scores[:, :N, 1] = self.lexical[slots[label[:, :N, 1]], ids[..., None]]
        chunk = max(1, TREE_CHUNK // (G ** 3))
        for w in range(2, N + 1):
            nodes = in_tree[:, :, w].nonzero()                           # (M, 2): sentence, start
            for r0 in range(0, len(nodes), chunk):
                b, i = nodes[r0:r0 + chunk].unbind(1)
                u = widest[b, i, w - 1]
                a = parent_slots[label[b, i, w]][:, :, None, None]       # (M, G, 1, 1)
                left = slots[label[b, i, u]][:, None, :, None]
                right = slots[label[b, i + u, w - u]][:, None, None, :]
                total = self.binary[a, left, right] + scores[b, i, u][:, None, :, None] \
                    + scores[b, i + u, w - u][:, None, None, :]           # (M, G, G, G)
                scores[b, i, w] = torch.logsumexp(total.flatten(2), -1)
        whole = self.root[parent_slots[label[every, 0, n]]] + scores[every, 0, n]  # (B, G)
        return torch.logsumexp(whole, -1).tolist()


def _by_length(sentences: Sequence[Sequence[str]], batch_size: int,
               decode_batch: Callable[..., list[Decoded]],
               pieces: tuple[str, Sequence[Sequence[int]]] | None = None) -> list[Decoded]:
    """`decode_batch` over batches of sentences of similar length; one result per sentence, in
    input order. ValueError for an empty sentence. With `pieces` (see `decode`),
    `decode_batch(words, pot)` also takes the batch's word-piece potentials (None where the
    batch has no barred position)."""
    for k, s in enumerate(sentences):
        if len(s) == 0:
            raise ValueError(f"sentence {k + 1} is empty")
    if pieces is not None and len(pieces[1]) != len(sentences):
        raise ValueError(f"{len(pieces[1])} lists of barred positions for {len(sentences)} "
                         "sentences")
    out: list[Decoded | None] = [None] * len(sentences)
    for batch in length_batches([len(s) for s in sentences], batch_size):
        words = [list(sentences[i]) for i in batch]
        if pieces is None:
            results = decode_batch(words)
        else:
            barred = [pieces[1][i] for i in batch]
            pot = piece_mask(pieces[0], barred, max(map(len, words)), torch.float64) \
                if any(barred) else None
            results = decode_batch(words, pot)
        for k, result in enumerate(results):
            out[batch[k]] = result
    return out  # type: ignore[return-value]


def decode(grammar: Grammar, sentences: Sequence[Sequence[str]], decoder: str = "mbr",
           batch_size: int = DECODE_BATCH, dtype: torch.dtype = torch.float64,
           pieces: tuple[str, Sequence[Sequence[int]]] | None = None,
           tree_logprobs: bool = True) -> list[Decoded]:
    """One tree per sentence, in input order, by the named decoder (see `DECODERS`).

    `tree_logprobs` False leaves `Decoded.tree_logprob` None for mbr and max-rule-product,
    saving the pass that sums each tree over its labels' refinements (a tenth of
    max-rule-product's time on a refined grammar); viterbi has it for free.

    `pieces`: decode under the word-piece constraint that training applies (`treewright.
    word_pieces`): (host side "first" or "last", per sentence the `barred_positions` of its
    `piece_joins`, as training makes them). Every decoder then weighs only the trees that keep
    each bound piece with its host, so none of them returns a tree that cuts one off;
    `log_likelihood` is then the log-probability summed over those trees, and `tree_logprob`
    the tree's own as ever."""
    if decoder in ENSEMBLE_DECODERS:
        raise ValueError(f"the {decoder} decoder reads several grammars: call "
                         "treewright.decode.consensus(grammars, sentences)")
    if decoder not in DECODERS:
        raise ValueError(f"unknown decoder {decoder!r}; choose one of {', '.join(DECODERS)}")
    # Made once for every batch: the tree scorer and max-rule-product's coarse layout.
    scorer = TreeScorer(grammar) if decoder != "viterbi" and tree_logprobs else None
    layout = CoarseLayout.of(grammar, dtype) if decoder == "max-rule-product" else None
    return _by_length(sentences, batch_size,
                      lambda words, pot=None: _decode_batch(grammar, words, decoder, dtype,
                                                            scorer, layout, pot), pieces)


def _decode_batch(grammar, sentences, decoder, dtype, scorer, layout,
                  pot: Tensor | None = None) -> list[Decoded]:
    pot = None if pot is None else pot.to(dtype)
    if decoder == "viterbi":
        enc = encode(grammar, sentences, dtype)
        results = engine.viterbi(grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal,
                                 enc.lengths, enc.nt_terminal, pot)
        logz = engine.log_partition(grammar.root.to(dtype), grammar.binary.to(dtype),
                                    enc.terminal, enc.lengths, enc.nt_terminal, pot)
        return [Decoded(None, NEG_INF, NEG_INF, NEG_INF) if res is None else
                Decoded(spans_to_tree(grammar, words, res[1]), float(z), res[0], res[0])
                for words, res, z in zip(sentences, results, logz)]
    # mbr reads the marginals alone; max-rule-product also the inside and outside scores. A
    # span the potentials bar has marginal 0, so max-rule-product, which weighs labeled spans
    # by their marginals, never takes one.
    tables = span_tables(grammar, sentences, dtype, log_scores=decoder != "mbr", span_pot=pot)
    lengths = [len(words) for words in sentences]
    if decoder == "mbr":
        results = _mbr_labeled(grammar, tables, lengths, pot)
    else:
        results = max_rule_product(grammar, tables, lengths, layout)
    trees = [None if result is None else tree_from_spans(words, result[0])
             for words, result in zip(sentences, results)]
    parsed = [b for b, result in enumerate(results) if result is not None]
    logprobs = iter([None] * len(parsed) if scorer is None else
                    scorer.logprobs_of_spans([sentences[b] for b in parsed],
                                             [results[b][0] for b in parsed]))
    logz = tables.logz.tolist()
    return [Decoded(None, NEG_INF, NEG_INF, NEG_INF) if tree is None else
            Decoded(tree, logz[b], next(logprobs), result[1])
            for b, (tree, result) in enumerate(zip(trees, results))]


def _mbr_labeled(grammar: Grammar, tables: engine.SpanTables, lengths: Sequence[int],
                 pot: Tensor | None = None
                 ) -> list[tuple[list[tuple[int, int, str]], float] | None]:
    """Per sentence, the MBR bracketing labeled by the most probable symbol of each span, and
    its expected number of correct spans (None for a sentence with no parse); with `pot`, among
    the bracketings whose spans it does not bar (`barred_out`)."""
    spans_p = _span_posteriors(tables.marginals, len(grammar.nonterminals))  # (B, N+1, N+1)
    brackets = mbr_spans_batch(barred_out(spans_p, pot), lengths)
    labels = _SpanLabels(grammar.symbols, len(grammar.nonterminals), tables.marginals)
    gains = spans_p.tolist()
    parsed = torch.isfinite(tables.logz).tolist()
    out: list = []
    for b, (n, spans) in enumerate(zip(lengths, brackets)):
        if not parsed[b]:
            out.append(None)
            continue
        gain = sum((gains[b][i][j - i] for i, j in spans), 0.0)
        out.append((labels.label(b, n, spans), gain))
    return out


def barred_out(gains: Tensor, pot: Tensor | None) -> Tensor:
    """Span gains (B, N+1, N+1) for `mbr_spans_batch` with -inf where the potentials `pot` are
    -inf: a barred span has marginal 0 under them, as may an allowed one, and a tie between the
    two must not go to the barred one. Every span the word-piece constraint allows holds a
    binary tree it allows (the left-branching one with the host first, the right-branching
    one with the host last), so the search never runs out of allowed trees."""
    if pot is None:
        return gains
    return gains.masked_fill(torch.isneginf(pot[:, :gains.shape[1], :gains.shape[2]]), NEG_INF)


def _span_posteriors(marginals: Tensor, nt: int) -> Tensor:
    """p(span [start, width] is a constituent | sentence), (B, N+1, N+1), from the label
    marginals (B, N+1, N+1, S): the `nt` nonterminals' summed (words' preterminals are not
    constituents)."""
    return marginals[..., :nt].sum(-1)


class _SpanLabels:
    """Each span's most probable label under one grammar, for a batch's span tables: wider spans
    take their most probable nonterminal, words their most probable symbol (a one-word
    sentence's single node must be a nonterminal: it is the top)."""

    def __init__(self, symbols: Sequence[str], nt: int, marginals: Tensor):
        """`symbols` nonterminals first (`nt` of them); `marginals` (B, N+1, N+1, S) their
        label marginals, as `engine.SpanTables` holds them."""
        self.symbols = list(symbols)
        self.span_label = marginals[..., :nt].argmax(-1).tolist()       # (B, N+1, N+1)
        self.word_label = marginals[:, :, 1].argmax(-1).tolist()        # (B, N+1)

    def label(self, b: int, n: int, spans: Sequence[tuple[int, int]]
              ) -> list[tuple[int, int, str]]:
        """Sentence b's `spans` (width >= 2) and its n words, labeled."""
        symbols, span_label = self.symbols, self.span_label[b]
        labeled = [(i, j, symbols[span_label[i][j - i]]) for i, j in spans]
        words = [span_label[0][1]] if n == 1 else self.word_label[b][:n]
        return labeled + [(i, i + 1, symbols[x]) for i, x in enumerate(words)]


def consensus(grammars: Sequence[Grammar], sentences: Sequence[Sequence[str]],
              batch_size: int = DECODE_BATCH, dtype: torch.dtype = torch.float64,
              pieces: tuple[str, Sequence[Sequence[int]]] | None = None) -> list[Decoded]:
    """One tree per sentence from several grammars (two or more; e.g. the restarts of one run),
    in input order, by tree averaging (Shayegh, Cao, Zhu, Cheung & Mou 2024, "Ensemble
    Distillation for Unsupervised Constituency Parsing").

    Each grammar that parses a sentence gives its unlabeled MBR tree (`mbr_spans_batch` over
    its span posteriors, as the `mbr` decoder); the tree kept is the binary tree with the
    largest summed F1 against those trees (`tree_average_batch`). Its spans and words are then
    labeled as the `mbr` decoder labels them, by their most probable symbol under the labeling
    grammar: the first grammar that parses the sentence (the first one, unless it cannot). A
    sentence no grammar parses gets tree None.

    Every grammar reads the same words through its own vocabulary, so the grammars must read
    unknown words alike: all with the same word shape scheme, or all without (ValueError
    otherwise). The caller normalises the words once, as the first grammar's training run did
    (`export.open_restart_grammars` gives a run's restarts with that run's record).
    `log_likelihood` and `tree_logprob` are the labeling grammar's; `score` is the mean F1 of
    the tree against the voting grammars' MBR trees (spans of width >= 2, the whole sentence
    included; 1 for a one-word sentence). Batches of `batch_size` sentences of similar length
    run one grammar at a time, so a batch needs the memory of one grammar's pass (see
    `budget.plan_budget`). `pieces` as for `decode`: every grammar's MBR tree, and the average,
    keep each bound piece with its host.
    """
    if len(grammars) < 2:
        raise ValueError(f"the consensus decoder needs two or more grammars, got {len(grammars)}")
    shapes = {g.vocab.shapes for g in grammars}
    if len(shapes) > 1:
        raise ValueError("the grammars read unknown words differently (word shape schemes "
                         f"{sorted(shapes, key=str)}); the consensus decoder gives every "
                         "grammar the same words")
    scorers: dict[int, TreeScorer] = {}  # per labelling grammar, by id, made when first needed
    return _by_length(sentences, batch_size,
                      lambda words, pot=None: _consensus_batch(grammars, words, dtype, scorers,
                                                               pot), pieces)


def _consensus_batch(grammars, sentences, dtype, scorers, pot=None) -> list[Decoded]:
    pot = None if pot is None else pot.to(dtype)
    lengths = [len(words) for words in sentences]
    B = len(sentences)
    voters: list[list[list[tuple[int, int]]]] = [[] for _ in range(B)]  # MBR trees per sentence
    labeler: list[tuple[Grammar, _SpanLabels, float] | None] = [None] * B
    for grammar in grammars:
        # One grammar's tables at a time: only its MBR trees and, where it labels, its most
        # probable labels are kept.
        tables = span_tables(grammar, sentences, dtype, log_scores=False, span_pot=pot)
        trees = mbr_spans_batch(barred_out(
            _span_posteriors(tables.marginals, len(grammar.nonterminals)), pot), lengths)
        parsed = torch.isfinite(tables.logz).tolist()
        labels = None
        for b in range(B):
            if not parsed[b]:
                continue
            voters[b].append(trees[b])
            if labeler[b] is None:
                if labels is None:
                    labels = _SpanLabels(grammar.symbols, len(grammar.nonterminals),
                                         tables.marginals)
                labeler[b] = (grammar, labels, float(tables.logz[b]))
        del tables  # freed before the next grammar's pass, not after it
    parsed_rows = [b for b in range(B) if voters[b]]
    averaged = tree_average_batch([voters[b] for b in parsed_rows],
                                  [lengths[b] for b in parsed_rows],
                                  None if pot is None else pot[parsed_rows])
    out = [Decoded(None, NEG_INF, NEG_INF, NEG_INF) for _ in range(B)]
    for b, spans in zip(parsed_rows, averaged):
        grammar, labels, logz = labeler[b]
        n = lengths[b]
        tree = tree_from_spans(sentences[b], labels.label(b, n, spans))
        kept = set(spans)
        # Both trees are binary with n - 1 spans each, so F1 is the shared spans over n - 1.
        agreement = 1.0 if n == 1 else sum(len(kept.intersection(t)) for t in voters[b]) \
            / ((n - 1) * len(voters[b]))
        out[b] = Decoded(tree, logz, NEG_INF, agreement)
    # Each labelling grammar scores the trees it labelled, all in one batch.
    for grammar in {id(g): g for g in grammars}.values():
        rows = [b for b in parsed_rows if labeler[b][0] is grammar]
        if rows:
            if id(grammar) not in scorers:
                scorers[id(grammar)] = TreeScorer(grammar)
            logprobs = scorers[id(grammar)].logprobs([out[b].tree for b in rows])
            for b, logprob in zip(rows, logprobs):
                out[b].tree_logprob = logprob
    return out


def under_pieces(run: Callable[[list[Sequence[str]], Pieces | None], Sequence[Decoded]],
                 sentences: Sequence[Sequence[str]], pieces: Pieces | None
                 ) -> tuple[list[Decoded], list[int]]:
    """`run(sentences, pieces)` (`decode` or `consensus` with their other arguments bound),
    and again without the constraint for the sentences it left no tree although they have a
    barred position: a grammar without every rule may have no tree that keeps each piece with
    its host (an induced one, with every rule, always has). Returns the results, in input
    order, and the indices of the sentences decoded without it, which the caller names."""
    results = list(run(list(sentences), pieces))
    if pieces is None:
        return results, []
    lost = [k for k, r in enumerate(results) if r.tree is None and pieces[1][k]]
    if lost:
        for k, again in zip(lost, run([sentences[k] for k in lost], None)):
            results[k] = again
    return results, lost


def mbr_decode(grammar: Grammar, sentences: Sequence[Sequence[str]],
               batch_size: int = DECODE_BATCH,
               dtype: torch.dtype = torch.float64) -> list[Tree | None]:
    """MBR trees (see the module docstring), None for sentences the grammar cannot parse."""
    return [d.tree for d in decode(grammar, sentences, "mbr", batch_size, dtype,
                                   tree_logprobs=False)]


@dataclass
class HeadedParse:
    """One sentence decoded by a lexicalized model. `tree` is None when the model cannot
    parse the sentence (a word outside the vocabulary, with no unknown-word token)."""
    tree: Tree | None     # preterminals over the words, nonterminals above (symbol names)
    heads: list[int]      # per word, the 1-based position of its head, 0 for the root's head
                          # word (the CoNLL-U HEAD convention); [] when there is no parse
    score: float          # log p of the best derivation (tree and latent classes); -inf: none


def decode_heads(model: LexicalizedParams, vocab: Vocabulary,
                 sentences: Sequence[Sequence[str]], nonterminals: Sequence[str],
                 preterminals: Sequence[str], batch_size: int = 16,
                 pieces: Pieces | None = None) -> list[HeadedParse]:
    """The best derivation of each sentence under a lexicalized model, in input order: a
    labeled tree and the dependency head of every word (`engine.lexicalized.
    lexicalized_viterbi`). `vocab` is the model's training vocabulary and `nonterminals`,
    `preterminals` its symbol names (`params.symbol_names`). `pieces` as for `decode`: the best
    derivation among those that keep each bound piece with its host."""
    names = list(nonterminals) + list(preterminals)

    def headed(words: list[str], parse: LexicalizedParse) -> HeadedParse:
        if not parse.spans:
            return HeadedParse(None, [], NEG_INF)
        tree = tree_from_spans(words, [(i, j, names[k]) for i, j, k, _ in parse.spans])
        return HeadedParse(tree, parse.heads, parse.score)

    def batch(words: list[list[str]], pot: Tensor | None = None) -> list[HeadedParse]:
        ids, lengths = pad_ids([vocab.encode(w) for w in words])
        return [headed(w, p) for w, p in zip(words, model.parse(ids, lengths, pot))]

    return _by_length(sentences, batch_size, batch,  # type: ignore[arg-type,return-value]
                      pieces)


def _encodable(vocab: Vocabulary, words: Sequence[Sequence[str]]
               ) -> tuple[list[int], Tensor | None, Tensor | None]:
    """The positions of the sentences `vocab` can encode (no word outside it, nor, without an
    unknown-word token, unknown) and their padded ids and lengths (None when there is none)."""
    encoded = [vocab.encode(w) for w in words]
    known = [k for k, ids in enumerate(encoded) if -1 not in ids]
    if not known:
        return known, None, None
    ids, lengths = pad_ids([encoded[k] for k in known])
    return known, ids, lengths


FACTORED_DECODERS = ("mbr", "max-rule-product")  # decoders of factored rules
LOWRANK_DENSE_AT_MOST = 2 ** 25  # entries of low-rank rules' (NT, S, S) tensor up to which
                                 # max-rule-product decodes with it (about 1 GB as it is laid out)


def decode_factored(rules, vocab: Vocabulary, nonterminals: Sequence[str],
                    preterminals: Sequence[str], sentences: Sequence[Sequence[str]],
                    batch_size: int = 16, decoder: str = "mbr") -> list[Decoded]:
    """The `mbr` or `max-rule-product` decoder on factored rules (`params.IndependentRules`,
    `params.LowRankRules`), in input order, through their own engine pass, without the
    (NT, S, S) rule tensor that a `Grammar` holds: a model with thousands of symbols decodes at
    about the cost of a training step.

    mbr (`label_marginals`): the unlabeled MBR tree of the span posteriors
    (`mbr_spans_batch`), each span labeled by its most probable nonterminal and each word by
    its most probable preterminal, as `mbr` labels them; `score` is the expected number of
    correct spans. max-rule-product (`span_tables`): every symbol is its own coarse symbol, and
    the tree maximizing the product of anchored rule posteriors is found, for independent
    productions, by a chart pass over the factors (`_max_rule_product_independent`); for
    low-rank rules whose (NT, S, S) tensor has at most `LOWRANK_DENSE_AT_MOST` entries, by
    `max_rule_product` on the grammar of that tensor (the span tables still from the factors),
    which falls back on a pass over the whole chart where the posteriors leave too many
    anchored rules; for larger low-rank rules, by the item pass alone
    (`_max_rule_product_factored`), each rule read from the factors (`binary_logprob`),
    which refuses a sentence whose posteriors leave too many. `score` is the tree's log
    rule-posterior product. `tree_logprob`
    is the tree's log-probability under the rules. The rules' dtype is the decoding dtype.
    `vocab` is the rules' vocabulary and `nonterminals`, `preterminals` their symbol names
    (`params.symbol_names`). A sentence with a word outside the vocabulary gets no tree."""
    if decoder not in FACTORED_DECODERS:
        raise ValueError(f"factored rules decode with {' or '.join(FACTORED_DECODERS)}, "
                         f"not {decoder!r}")
    symbols = list(nonterminals) + list(preterminals)
    nt = len(nonterminals)
    layout = CoarseLayout.of_rules(rules.binary_logprob, symbols, nt)
    factors = _IndependentFactors(rules, nt, rules.left.dtype) \
        if decoder == "max-rule-product" and isinstance(rules, IndependentRules) else None
    dense = None     # low-rank rules small enough for their (NT, S, S) tensor: (grammar, layout)
    if decoder == "max-rule-product" and factors is None and \
            nt * len(symbols) ** 2 <= LOWRANK_DENSE_AT_MOST:
        grammar = rules_to_grammar(rules.dense(), nonterminals, preterminals, vocab)
        dense = grammar, CoarseLayout.of(grammar, rules.u.dtype)

    def batch(words: list[list[str]]) -> list[Decoded]:
        out = [Decoded(None, NEG_INF, NEG_INF, NEG_INF)] * len(words)
        known, ids, lengths = _encodable(vocab, words)
        if not known:
            return out
        n = lengths.tolist()
        with torch.no_grad():
            terminal = encode_ids(rules.lexical, ids, lengths).terminal
            if decoder == "mbr":
                logz, marginals = rules.label_marginals(terminal, lengths)
            else:
                tables = rules.span_tables(terminal, lengths)
                logz = tables.logz
                if factors is not None:      # independent productions
                    found = _max_rule_product_independent(rules, tables, n, symbols, nt,
                                                          factors)
                elif dense is not None:      # low-rank rules whose dense tensor fits
                    found = max_rule_product(dense[0], tables, n, dense[1])
                else:
                    found = max_rule_product(None, tables, n, layout)
        parsed = [b for b in range(len(known)) if math.isfinite(float(logz[b]))]
        if decoder == "mbr":
            spans_p = _span_posteriors(marginals, nt)                    # (B, N+1, N+1)
            brackets = mbr_spans_batch(spans_p, n)
            labels = _SpanLabels(symbols, nt, marginals)
            gains = spans_p.double().tolist()
            labeled = [labels.label(b, n[b], brackets[b]) for b in parsed]
            scores = [sum((gains[b][i][j - i] for i, j in brackets[b]), 0.0) for b in parsed]
        else:
            parsed = [b for b in parsed if found[b] is not None]
            labeled = [found[b][0] for b in parsed]
            scores = [found[b][1] for b in parsed]
        logprobs = _factored_tree_logprobs(rules, symbols, nt, ids[parsed], labeled)
        for b, spans, logprob, score in zip(parsed, labeled, logprobs, scores):
            out[known[b]] = Decoded(tree_from_spans(words[known[b]], spans), float(logz[b]),
                                    logprob, score)
        return out

    return _by_length(sentences, batch_size, batch)


def _factored_tree_logprobs(rules, symbols: Sequence[str], nt: int, ids: Tensor,
                            labeled: Sequence[Sequence[tuple[int, int, str]]]) -> list[float]:
    """log p(tree, sentence) of each labeled binary tree (spans with their labels, words
    included) under factored rules: every node's rule (`rules.binary_logprob`, gathered for the
    whole batch at once), every word's lexical rule and the top symbol's root score."""
    index = {name: k for k, name in enumerate(symbols)}
    of, parent, left, right, words, tags, top = [], [], [], [], [], [], []
    for b, spans in enumerate(labeled):
        label = {(i, j): index[x] for i, j, x in spans}
        n = max(j for _, j, _ in spans)
        top.append(label[(0, n)])
        for (i, j), x in label.items():
            if j - i == 1:
                words.append((b, i))
                tags.append(x - nt)
                continue
            k = next(k for k in range(j - 1, i, -1) if (i, k) in label and (k, j) in label)
            of.append(b)
            parent.append(x)
            left.append(label[(i, k)])
            right.append(label[(k, j)])
    if not labeled:
        return []
    with torch.no_grad():
        total = rules.root[torch.tensor(top)].double()
        if of:
            node = rules.binary_logprob(torch.tensor(parent), torch.tensor(left),
                                        torch.tensor(right)).double()
            total = total.index_add(0, torch.tensor(of), node)
        b, i = torch.tensor(words).unbind(1)
        word = rules.lexical[torch.tensor(tags), ids[b, i]].double()
        total = total.index_add(0, b, word)
    return total.tolist()


def decode_lexicalized(model: LexicalizedParams, vocab: Vocabulary, grammar: Grammar,
                       sentences: Sequence[Sequence[str]], batch_size: int = 16,
                       pieces: Pieces | None = None) -> list[Decoded]:
    """One tree per sentence from a lexicalized model's own span posteriors (head words summed
    out, `LexicalizedScorer.span_posteriors`), in input order: the unlabeled MBR tree
    (`mbr_spans_batch`), the trees the induction benchmark scores for a lexicalized model.
    Its spans and words are labeled as the `mbr` decoder labels them, by their most probable
    symbol under `grammar`, the model's symbol-only back-off grammar (`LexicalizedParams.
    to_grammar`, the run's grammar.pcfg). `vocab` is the model's training vocabulary.

    `log_likelihood` is the model's log p(sentence) and `score` the expected number of
    correct spans; `tree_logprob` is nan, as the model gives a tree's probability only with
    its head words (summing them out per tree is not done here). A sentence with a word
    outside the vocabulary gets no tree. `pieces` as for `decode`: the posteriors, the tree and
    its labels are those of the trees that keep each bound piece with its host, and
    `log_likelihood` sums those trees alone."""
    scorer = model.scorer()

    def batch(words: list[list[str]], pot: Tensor | None = None) -> list[Decoded]:
        out = [Decoded(None, NEG_INF, NEG_INF, NEG_INF)] * len(words)
        known, ids, lengths = _encodable(vocab, words)
        if not known:
            return out
        if pot is not None:   # the known sentences' rows, as wide as their longest
            width = ids.shape[1] + 1
            pot = pot[known][:, :width, :width]
        logz, spans_p = scorer.span_posteriors(ids, lengths, pot)   # (B,), (B, N+1, N+1)
        n = lengths.tolist()
        brackets = mbr_spans_batch(barred_out(spans_p, pot), n)
        tables = span_tables(grammar, [words[k] for k in known], torch.float64,
                             log_scores=False, span_pot=pot)
        labels = _SpanLabels(grammar.symbols, len(grammar.nonterminals), tables.marginals)
        gains = spans_p.double().tolist()
        for b, k in enumerate(known):
            if not math.isfinite(float(logz[b])):
                continue
            gain = sum((gains[b][i][j - i] for i, j in brackets[b]), 0.0)
            tree = tree_from_spans(words[k], labels.label(b, n[b], brackets[b]))
            out[k] = Decoded(tree, float(logz[b]), math.nan, gain)
        return out

    return _by_length(sentences, batch_size, batch, pieces)
