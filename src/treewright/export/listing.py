"""A readable listing of a grammar for people: per symbol its usage, entropy and top rules.

Usage is the symbol's expected count over a corpus (the sum over the corpus of the posterior
probability of each node it labels), given only when a corpus is. Entropy is in bits, over all
of the symbol's rules (binary and lexical together for a nonterminal). Rules below the
probability threshold or past the per-symbol cap are not printed but counted, with their total
probability, on a line of their own, so a listing never hides that rules were left out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import torch

from treewright import engine
from treewright.corpus.batching import length_batches
from treewright.grammar import Grammar, quote
from treewright.inference import encode

DEFAULT_THRESHOLD = 0.01  # rules below 1% rarely help a reader; the cut line counts them
DEFAULT_TOP = 10          # about a screen of rules per symbol


@dataclass
class ExpectedCounts:
    """Posterior expected counts over a corpus (sums over sentences that parse).

    root:    (NT,)       expected number of trees with each nonterminal on top
    binary:  (NT, S, S)  expected uses of each binary rule
    lexical: (S, V)      expected uses of each lexical rule
    """
    root: torch.Tensor
    binary: torch.Tensor
    lexical: torch.Tensor
    sentences: int
    unparsed: int

    def symbol_usage(self, grammar: Grammar) -> list[float]:
        """Expected count of nodes labelled by each symbol, in `grammar.symbols` order."""
        nt = len(grammar.nonterminals)
        usage = self.lexical.sum(1).clone()                  # (S,)
        usage[:nt] += self.binary.flatten(1).sum(1)
        return usage.tolist()


def expected_counts(grammar: Grammar, sentences: Sequence[Sequence[str]],
                    batch_size: int = 32) -> ExpectedCounts:
    """Expected rule counts of `sentences` under `grammar` (inside-outside in float64)."""
    nt, s, v = len(grammar.nonterminals), grammar.num_symbols, len(grammar.vocab)
    dtype = torch.float64
    root = torch.zeros(nt, dtype=dtype)
    binary = torch.zeros(nt, s, s, dtype=dtype)
    lexical = torch.zeros(s, v, dtype=dtype)
    unparsed = 0
    for batch in length_batches([len(s) for s in sentences], batch_size):
        words = [sentences[i] for i in batch]
        enc = encode(grammar, words, dtype)
        post = engine.posteriors(grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal,
                                 enc.lengths, enc.nt_terminal)
        unparsed += int((~torch.isfinite(post.logz)).sum())
        root += post.root.sum(0)
        binary += post.binary
        for b, sentence in enumerate(words):
            n = len(sentence)
            ids = enc.ids[b, :n]
            known = enc.known[b, :n]  # a sentence with a word outside the vocabulary: no parse
            lexical[nt:].index_add_(1, ids[known], post.terminal[b, :n][known].T)
            if post.nt_terminal is not None:
                lexical[:nt].index_add_(1, ids[known], post.nt_terminal[b, :n][known].T)
    return ExpectedCounts(root, binary, lexical, len(sentences), unparsed)


@dataclass
class RuleLine:
    rhs: str      # the right-hand side as the text format writes it
    prob: float


@dataclass
class SymbolSummary:
    """One symbol of the listing. kind: "start", "nonterminal" or "preterminal".

    rules: the shown rules, most probable first; hidden/hidden_mass: how many rules the cut
    left out and their total probability. usage: expected count (None without a corpus).
    """
    name: str
    kind: str
    entropy_bits: float
    num_rules: int
    rules: list[RuleLine] = field(default_factory=list)
    hidden: int = 0
    hidden_mass: float = 0.0
    usage: float | None = None


def symbol_distribution(grammar: Grammar, name: str) -> list[RuleLine]:
    """All rules of one symbol (nonzero probability), most probable first, ties by text."""
    names = grammar.symbols
    nt = len(grammar.nonterminals)
    lines: list[RuleLine] = []
    if name == grammar.start and not grammar.root_is_symbol:
        root = grammar.root.double()
        lines = [RuleLine(names[a], math.exp(float(root[a]))) for a in range(nt)
                 if root[a] > -math.inf]
    else:
        a = names.index(name)
        if a < nt:
            binary = grammar.binary[a].double()
            for b, c in torch.nonzero(torch.isfinite(binary)).tolist():
                lines.append(RuleLine(f"{names[b]} {names[c]}", math.exp(float(binary[b, c]))))
        lexical = grammar.lexical[a].double()
        for w in torch.nonzero(torch.isfinite(lexical)).flatten().tolist():
            lines.append(RuleLine(quote(grammar.vocab.words[w]), math.exp(float(lexical[w]))))
    lines.sort(key=lambda r: (-r.prob, r.rhs))
    return lines


def entropy_bits(probs: Sequence[float]) -> float:
    """Shannon entropy in bits; zero-probability outcomes contribute nothing (0 log 0 = 0)."""
    return 0.0 - sum(p * math.log2(p) for p in probs if p > 0.0)  # 0.0 -: no "-0.0"


def summarize(grammar: Grammar, counts: ExpectedCounts | None = None,
              threshold: float = DEFAULT_THRESHOLD, top: int | None = DEFAULT_TOP
              ) -> list[SymbolSummary]:
    """The listing's symbols: the start symbol first (when it is a symbol of its own), then
    the others by expected usage (most used first) when `counts` is given, else in the
    grammar's order. A rule is shown when its probability is >= `threshold` and it is among
    the symbol's `top` most probable (None: no cap)."""
    nt = len(grammar.nonterminals)
    usage = counts.symbol_usage(grammar) if counts is not None else None
    out: list[SymbolSummary] = []
    names = ([] if grammar.root_is_symbol else [grammar.start]) + grammar.symbols
    for name in names:
        if name == grammar.start and not grammar.root_is_symbol:
            kind = "start"
            use = None if counts is None else counts.sentences - counts.unparsed
        else:
            a = grammar.symbols.index(name)
            kind = "nonterminal" if a < nt else "preterminal"
            use = None if usage is None else usage[a]
        rules = symbol_distribution(grammar, name)
        shown = [r for r in rules if r.prob >= threshold][: top if top is not None else None]
        shown_ids = {id(r) for r in shown}
        hidden = [r for r in rules if id(r) not in shown_ids]
        out.append(SymbolSummary(name, kind, entropy_bits([r.prob for r in rules]), len(rules),
                                 shown, len(hidden), sum(r.prob for r in hidden), use))
    if usage is not None:
        head = out[:1] if out and out[0].kind == "start" else []
        rest = out[len(head):]
        rest.sort(key=lambda s: -(s.usage or 0.0))
        out = head + rest
    return out


def format_listing(grammar: Grammar, summaries: list[SymbolSummary], threshold: float,
                   top: int | None, corpus_note: str | None = None) -> str:
    """The listing as text (what `treewright inspect` prints and `export --to listing` saves)."""
    from treewright.export.source import iter_rules

    num_rules = sum(1 for _ in iter_rules(grammar))
    lines = [f"# {len(grammar.nonterminals)} nonterminals, {len(grammar.preterminals)} "
             f"preterminals, {len(grammar.vocab)} words, {num_rules} rules; start symbol "
             f"{grammar.start}",
             f"# shown: rules with probability >= {threshold:g}"
             + (f", at most {top} per symbol" if top is not None else "")
             + "; entropy in bits over all of a symbol's rules"]
    if corpus_note:
        lines.append(f"# usage: {corpus_note}")
    for summary in summaries:
        lines.append("")
        lines.extend(format_symbol(summary))
    return "\n".join(lines) + "\n"


def format_symbol(summary: SymbolSummary) -> list[str]:
    head = (f"{summary.name}  ({summary.kind})  entropy {summary.entropy_bits:.4f} bits  "
            f"{summary.num_rules} rule{'s' if summary.num_rules != 1 else ''}")
    if summary.usage is not None:
        head += f"  usage {summary.usage:.4f}"
    lines = [head]
    label = "words" if summary.kind == "preterminal" else "rules"
    for rule in summary.rules:
        lines.append(f"  {rule.prob:.6f}  {summary.name} -> {rule.rhs}")
    if summary.hidden:
        lines.append(f"  ... {summary.hidden} more {label}, total probability "
                     f"{summary.hidden_mass:.6f}")
    return lines


@dataclass
class SpanExample:
    """A span of a corpus sentence for one symbol. posterior: for a symbol over one word, the
    posterior probability that this symbol is right above the word; for a wider span, the
    posterior probability that the span is a constituent at all (an upper bound on it having
    this label). in_viterbi: the Viterbi tree labels the span with the symbol."""
    sentence: int           # index into the sentences given
    start: int
    end: int
    words: list[str]
    posterior: float
    in_viterbi: bool


def symbol_examples(grammar: Grammar, sentences: Sequence[Sequence[str]], name: str,
                    limit: int = 10, batch_size: int = 32) -> list[SpanExample]:
    """The `limit` best example spans of symbol `name`, highest posterior first.

    Preterminals (and nonterminals that emit words, over one word): every word position,
    ranked by the posterior that the symbol is right above it. Wider spans: the spans the
    Viterbi trees label with the symbol, ranked by their constituent posterior.
    """
    from treewright.inference import viterbi_parse

    index = grammar.symbols.index(name)
    nt = len(grammar.nonterminals)
    viterbi = viterbi_parse(grammar, sentences, batch_size=batch_size)
    labelled: dict[int, set[tuple[int, int]]] = {}  # sentence -> spans labelled `name`
    for k, (tree, _) in enumerate(viterbi):
        if tree is not None:
            labelled[k] = {(i, j) for i, j, label in tree.labeled_spans() if label == name}
    found: list[SpanExample] = []
    dtype = torch.float64
    for batch in length_batches([len(s) for s in sentences], batch_size):
        words = [sentences[i] for i in batch]
        enc = encode(grammar, words, dtype)
        post = engine.posteriors(grammar.root.to(dtype), grammar.binary.to(dtype), enc.terminal,
                                 enc.lengths, enc.nt_terminal)
        for b, k in enumerate(batch):
            if not bool(torch.isfinite(post.logz[b])):
                continue
            n = len(sentences[k])
            if index >= nt:
                one_word = post.terminal[b, :n, index - nt].tolist()
            elif post.nt_terminal is not None:
                one_word = post.nt_terminal[b, :n, index].tolist()
            else:
                one_word = [0.0] * n
            for i, p in enumerate(one_word):
                if p > 0.0:
                    found.append(SpanExample(k, i, i + 1, [sentences[k][i]], p,
                                             (i, i + 1) in labelled.get(k, ())))
            for i, j in labelled.get(k, ()):
                if j - i >= 2:
                    found.append(SpanExample(k, i, j, list(sentences[k][i:j]),
                                             float(post.spans[b, i, j - i]), True))
    found.sort(key=lambda e: (-e.posterior, e.sentence, e.start, e.end))
    return found[:limit]
