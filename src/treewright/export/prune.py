"""Pruning: drop rules below a probability threshold or outside each symbol's top k, and
renormalise what is left.

Guarantees (each reported, never silent):
- A left-hand side from which nothing is removed keeps its exact bits, so threshold 0 with no
  cap returns the same grammar.
- Every left-hand side keeps at least its most probable rule (listed in `kept_to_avoid_empty`
  when that rule was below the cut).
- With a training corpus, every rule used by a training sentence's Viterbi tree under the
  unpruned grammar is kept (`protected_rules`), so each sentence that parsed still parses.
  The training corpus is scored again after pruning to show it (`train_unparsed_after`).
- Symbols that can no longer derive any word are listed in `unproductive`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import torch

from treewright.grammar import Grammar
from treewright.inference import corpus_summary, score, viterbi_parse


@dataclass
class PruneReport:
    """What pruning did. removed_mass: per left-hand side with something removed, the
    probability mass removed (before renormalising); total_removed_mass is their sum.
    heldout_before/after: `inference.corpus_summary` of the held-out corpus (None without one).
    """
    threshold: float
    top_k: int | None
    rules_before: int
    rules_after: int
    removed_mass: dict[str, float] = field(default_factory=dict)
    total_removed_mass: float = 0.0
    kept_to_avoid_empty: list[str] = field(default_factory=list)
    protected_rules: int = 0
    unproductive: list[str] = field(default_factory=list)
    heldout_before: dict | None = None
    heldout_after: dict | None = None
    train_sentences: int | None = None
    train_unparsed_before: int | None = None
    train_unparsed_after: int | None = None

    def format(self) -> str:
        lines = [f"pruning: threshold {self.threshold:g}"
                 + (f", top {self.top_k} per symbol" if self.top_k is not None else "")
                 + f"; rules {self.rules_before} -> {self.rules_after}",
                 f"probability mass removed: {self.total_removed_mass:.6g} in total over "
                 f"{len(self.removed_mass)} left-hand sides"]
        for name, mass in sorted(self.removed_mass.items(), key=lambda kv: -kv[1]):
            lines.append(f"  {name}: {mass:.6g}")
        if self.kept_to_avoid_empty:
            lines.append("kept below the cut so that no symbol is left without rules: "
                         + ", ".join(self.kept_to_avoid_empty))
        if self.train_sentences is not None:
            lines.append(f"training corpus: {self.protected_rules} rules kept for its Viterbi "
                         f"trees; sentences without a parse {self.train_unparsed_before} before, "
                         f"{self.train_unparsed_after} after (of {self.train_sentences})")
        if self.unproductive:
            lines.append("WARNING: these symbols can no longer derive any word: "
                         + ", ".join(self.unproductive))
        for title, summary in (("before", self.heldout_before), ("after", self.heldout_after)):
            if summary is not None:
                lines.append(f"held-out {title}: log-likelihood {summary['log_likelihood']!r}, "
                             f"per word {-summary['cross_entropy_nats']!r}, perplexity "
                             f"{summary['perplexity']:.6g}, {summary['unparsed']} of "
                             f"{summary['sentences']} sentences without a parse")
        return "\n".join(lines)


def prune(grammar: Grammar, threshold: float = 0.0, top_k: int | None = None,
          train: Sequence[Sequence[str]] | None = None,
          heldout: Sequence[Sequence[str]] | None = None) -> tuple[Grammar, PruneReport]:
    """The pruned grammar and the report (see the module docstring).

    threshold: rules with probability below it are dropped (default 0: none).
    top_k: keep at most this many rules per left-hand side (None: no cap; ties go to the rule
        that comes first in the grammar text format).
    train, heldout: tokenised sentences (optional; see PruneReport).
    """
    if not (0.0 <= threshold <= 1.0):
        raise ValueError(f"threshold must be in [0, 1], not {threshold}")
    if top_k is not None and top_k < 1:
        raise ValueError(f"top_k must be at least 1, not {top_k}")
    nt, s = len(grammar.nonterminals), grammar.num_symbols
    root_keep = torch.isfinite(grammar.root)
    binary_keep = torch.isfinite(grammar.binary)
    lexical_keep = torch.isfinite(grammar.lexical)
    report = PruneReport(threshold, top_k, _count(root_keep, binary_keep, lexical_keep, grammar),
                         0)
    before_parses = None
    if train is not None:
        before_parses = viterbi_parse(grammar, train)
        report.train_sentences = len(train)
        report.train_unparsed_before = sum(1 for t, _ in before_parses if t is None)

    def cut(logp: torch.Tensor, name: str) -> torch.Tensor:
        """(K,) keep mask for one left-hand side's rules (flattened)."""
        probs = logp.double().exp()
        keep = (probs > 0) & (probs >= threshold)
        if top_k is not None and int(keep.sum()) > top_k:
            order = torch.sort(-probs, stable=True).indices[:top_k]
            capped = torch.zeros_like(keep)
            capped[order] = True
            keep &= capped
        if not bool(keep.any()) and bool((probs > 0).any()):
            keep[int(torch.argmax(probs))] = True
            report.kept_to_avoid_empty.append(name)
        return keep

    names = grammar.symbols
    if not grammar.root_is_symbol:
        root_keep = cut(grammar.root, grammar.start)
    for a in range(s):
        if a < nt:
            row = torch.cat([grammar.binary[a].flatten(), grammar.lexical[a]])
            keep = cut(row, names[a])
            binary_keep[a] = keep[: s * s].view(s, s)
            lexical_keep[a] = keep[s * s:]
        else:
            lexical_keep[a] = cut(grammar.lexical[a], names[a])
    if before_parses is not None:
        report.protected_rules = _protect(grammar, before_parses, root_keep, binary_keep,
                                          lexical_keep)
    root, binary, lexical = grammar.root.clone(), grammar.binary.clone(), grammar.lexical.clone()
    if not grammar.root_is_symbol:
        _renormalise(root, root_keep, grammar.start, report)
    for a in range(s):
        if a < nt:
            flat = torch.cat([binary[a].flatten(), lexical[a]])
            keep = torch.cat([binary_keep[a].flatten(), lexical_keep[a]])
            if _renormalise(flat, keep, names[a], report):
                binary[a] = flat[: s * s].view(s, s)
                lexical[a] = flat[s * s:]
        else:
            _renormalise(lexical[a], lexical_keep[a], names[a], report)
    pruned = Grammar(list(grammar.nonterminals), list(grammar.preterminals), grammar.vocab,
                     root, binary, lexical, grammar.start)
    report.rules_after = _count(torch.isfinite(root), torch.isfinite(binary),
                                torch.isfinite(lexical), grammar)
    report.total_removed_mass = sum(report.removed_mass.values())
    report.unproductive = _unproductive(pruned)
    if train is not None:
        after = score(pruned, train, dtype=torch.float64)
        report.train_unparsed_after = sum(1 for x in after if not x.parsed)
    if heldout is not None:
        report.heldout_before = corpus_summary(score(grammar, heldout, dtype=torch.float64))
        report.heldout_after = corpus_summary(score(pruned, heldout, dtype=torch.float64))
    return pruned, report


def _count(root_keep, binary_keep, lexical_keep, grammar: Grammar) -> int:
    roots = 0 if grammar.root_is_symbol else int(root_keep.sum())
    return roots + int(binary_keep.sum()) + int(lexical_keep.sum())


def _renormalise(logp: torch.Tensor, keep: torch.Tensor, name: str, report: PruneReport) -> bool:
    """Drop the rules outside `keep` from one left-hand side in place and renormalise; a side
    that loses nothing is left untouched (its exact bits). Returns whether it changed."""
    dropped = torch.isfinite(logp) & ~keep
    if not bool(dropped.any()):
        return False
    probs = logp.double().exp()
    removed = float(probs[dropped].sum())
    report.removed_mass[name] = removed
    kept_total = float(probs[keep].sum())
    logp[dropped] = -math.inf
    logp[keep] = logp[keep] - math.log(kept_total)
    return True


def _protect(grammar: Grammar, parses, root_keep, binary_keep, lexical_keep) -> int:
    """Mark every rule of the training Viterbi trees as kept; returns how many were not
    kept already."""
    index = {name: i for i, name in enumerate(grammar.symbols)}
    vocab = grammar.vocab
    added = 0
    for tree, _ in parses:
        if tree is None:
            continue
        top = index[tree.label]
        if not grammar.root_is_symbol and not root_keep[top]:
            root_keep[top] = True
            added += 1
        for node in tree.subtrees():
            a = index[node.label]
            if node.is_preterminal():
                w = vocab.lookup(node.children[0])
                if not lexical_keep[a, w]:
                    lexical_keep[a, w] = True
                    added += 1
            else:
                b, c = (index[child.label] for child in node.children)
                if not binary_keep[a, b, c]:
                    binary_keep[a, b, c] = True
                    added += 1
    return added


def _unproductive(grammar: Grammar) -> list[str]:
    """Symbols from which no tree reaches words (a fixed point over the binary rules)."""
    nt = len(grammar.nonterminals)
    productive = torch.isfinite(grammar.lexical).any(1)  # (S,)
    binary = torch.isfinite(grammar.binary)
    while True:
        pairs = productive[:, None] & productive[None, :]
        grown = productive.clone()
        grown[:nt] |= (binary & pairs).flatten(1).any(1)
        if bool((grown == productive).all()):
            break
        productive = grown
    return [name for name, ok in zip(grammar.symbols, productive.tolist()) if not ok]
