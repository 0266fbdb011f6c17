"""Two grammars on the same text: held-out likelihood, bracket agreement, symbol matching.

Brackets are the spans of the Viterbi trees of width >= 2 other than the whole sentence (the
whole span is in every tree, so counting it only inflates agreement; common practice in
unsupervised parsing evaluation). Agreement is the F1 of one grammar's brackets against the
other's, which is symmetric: 2 * shared / (brackets of A + brackets of B), summed over the
sentences both grammars parse.

The symbol matching pairs each symbol of A with at most one of B so that the number of
labelled spans on which the two Viterbi trees carry the paired labels is as large as possible:
an assignment problem over the span-overlap matrix, solved exactly by SciPy's
`linear_sum_assignment` (Kuhn 1955, "The Hungarian method for the assignment problem"). All
spans count here, one-word spans (preterminals) and the whole sentence included.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import torch

from treewright.grammar import Grammar
from treewright.inference import corpus_summary, score, viterbi_parse
from treewright.trees import Tree


@dataclass
class SymbolMatch:
    """A matched pair: `overlap` spans labelled `a` by A and `b` by B; `a_spans` and `b_spans`
    are how many spans each labels in all."""
    a: str
    b: str
    overlap: int
    a_spans: int
    b_spans: int


@dataclass
class Comparison:
    heldout_a: dict                  # inference.corpus_summary under A (log_likelihood None
                                     # when nothing parsed)
    heldout_b: dict
    sentences: int
    both_parsed: int                 # sentences that both grammars parse (the rest: not compared)
    brackets_a: int
    brackets_b: int
    brackets_shared: int
    same_bracketing: int             # sentences whose two bracket sets are equal
    matching: list[SymbolMatch] = field(default_factory=list)
    unmatched_a: list[str] = field(default_factory=list)   # symbols of A with no partner
    unmatched_b: list[str] = field(default_factory=list)
    labelled_spans: int = 0          # spans compared for the matching

    @property
    def bracket_f1(self) -> float:
        total = self.brackets_a + self.brackets_b
        return 2 * self.brackets_shared / total if total else float("nan")

    @property
    def matched_fraction(self) -> float:
        """Share of the compared spans on which the matched labels agree."""
        agree = sum(m.overlap for m in self.matching)
        return agree / self.labelled_spans if self.labelled_spans else float("nan")

    def to_dict(self) -> dict:
        return {"sentences": self.sentences, "both_parsed": self.both_parsed,
                "heldout_a": self.heldout_a, "heldout_b": self.heldout_b,
                "brackets_a": self.brackets_a, "brackets_b": self.brackets_b,
                "brackets_shared": self.brackets_shared, "bracket_f1": self.bracket_f1,
                "same_bracketing": self.same_bracketing,
                "matching": [vars(m) for m in self.matching],
                "unmatched_a": self.unmatched_a, "unmatched_b": self.unmatched_b,
                "labelled_spans": self.labelled_spans,
                "matched_fraction": self.matched_fraction}

    def format(self, name_a: str = "A", name_b: str = "B") -> str:
        def ll(summary: dict) -> str:
            if not summary["parsed"]:
                # A sum over no sentences is 0 and its perplexity nan; neither is a score.
                return (f"no sentence parsed ({summary['sentences']} of "
                        f"{summary['sentences']} without a parse): no log-likelihood or "
                        f"perplexity")
            return (f"log-likelihood {summary['log_likelihood']!r}, per word "
                    f"{-summary['cross_entropy_nats']!r}, perplexity "
                    f"{summary['perplexity']:.6g}, {summary['unparsed']} of "
                    f"{summary['sentences']} without a parse")
        lines = [f"held-out {name_a}: {ll(self.heldout_a)}",
                 f"held-out {name_b}: {ll(self.heldout_b)}",
                 "brackets: no sentence parsed by both grammars, nothing compared"
                 if not self.both_parsed else
                 f"brackets: {self.brackets_shared} shared of {self.brackets_a} ({name_a}) and "
                 f"{self.brackets_b} ({name_b}); agreement F1 {self.bracket_f1:.4f}; identical "
                 f"bracketing in {self.same_bracketing} of {self.both_parsed} sentences parsed "
                 f"by both ({self.sentences - self.both_parsed} not compared)",
                 f"symbol matching: labels agree on {self.matched_fraction:.4f} of "
                 f"{self.labelled_spans} spans" if self.labelled_spans else
                 "symbol matching: no spans to compare"]
        for m in self.matching:
            lines.append(f"  {m.a} = {m.b}  overlap {m.overlap} (of {m.a_spans} / {m.b_spans})")
        if self.unmatched_a:
            lines.append(f"  unmatched in {name_a}: {', '.join(self.unmatched_a)}")
        if self.unmatched_b:
            lines.append(f"  unmatched in {name_b}: {', '.join(self.unmatched_b)}")
        return "\n".join(lines)


def brackets(tree: Tree) -> set[tuple[int, int]]:
    """Spans of width >= 2 except the whole sentence."""
    n = len(tree.leaves())
    return {(i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2 and (i, j) != (0, n)}


def overlap_matrix(trees_a: Sequence[Tree | None], trees_b: Sequence[Tree | None],
                   symbols_a: list[str], symbols_b: list[str]) -> tuple[np.ndarray, int]:
    """(len(symbols_a), len(symbols_b)) counts of spans labelled (a, b), and the number of
    spans compared, over sentences both trees exist for."""
    ia = {s: k for k, s in enumerate(symbols_a)}
    ib = {s: k for k, s in enumerate(symbols_b)}
    counts = np.zeros((len(symbols_a), len(symbols_b)), dtype=np.int64)
    compared = 0
    for ta, tb in zip(trees_a, trees_b):
        if ta is None or tb is None:
            continue
        labels_b = {(i, j): label for i, j, label in tb.labeled_spans()}
        for i, j, label in ta.labeled_spans():
            other = labels_b.get((i, j))
            if other is not None:
                counts[ia[label], ib[other]] += 1
                compared += 1
    return counts, compared


def match_symbols(counts: np.ndarray, symbols_a: list[str], symbols_b: list[str]
                  ) -> tuple[list[SymbolMatch], list[str], list[str]]:
    """The best one-to-one matching (largest total overlap); pairs with no overlap at all are
    left unmatched rather than paired on no evidence."""
    from scipy.optimize import linear_sum_assignment

    rows, cols = linear_sum_assignment(counts, maximize=True)
    matches = [SymbolMatch(symbols_a[r], symbols_b[c], int(counts[r, c]),
                           int(counts[r].sum()), int(counts[:, c].sum()))
               for r, c in zip(rows, cols) if counts[r, c] > 0]
    matches.sort(key=lambda m: (-m.overlap, m.a))
    used_a = {m.a for m in matches}
    used_b = {m.b for m in matches}
    return (matches, [s for s in symbols_a if s not in used_a],
            [s for s in symbols_b if s not in used_b])


def _heldout(scores) -> dict:
    """`corpus_summary`, with the log-likelihood None when no sentence parsed (its sum over no
    sentences would read as a perfect 0)."""
    summary = corpus_summary(scores)
    if not summary["parsed"]:
        summary["log_likelihood"] = None
    return summary


def compare(grammar_a: Grammar, grammar_b: Grammar, sentences: Sequence[Sequence[str]],
            sentences_b: Sequence[Sequence[str]] | None = None) -> Comparison:
    """Compare two grammars on tokenised `sentences` (see the module docstring).

    sentences_b: the same sentences as grammar B reads them, when its words were normalised
    otherwise than A's (one run lowercased, the other not); each must have as many tokens as
    its counterpart, so that spans mean the same in both. By default B reads `sentences`.
    """
    if sentences_b is None:
        sentences_b = sentences
    if len(sentences_b) != len(sentences) or any(
            len(x) != len(y) for x, y in zip(sentences, sentences_b)):
        raise ValueError("sentences_b must have the tokens of `sentences`, one for one")
    heldout_a = _heldout(score(grammar_a, sentences, dtype=torch.float64))
    heldout_b = _heldout(score(grammar_b, sentences_b, dtype=torch.float64))
    trees_a = [t for t, _ in viterbi_parse(grammar_a, sentences)]
    trees_b = [t for t, _ in viterbi_parse(grammar_b, sentences_b)]
    result = Comparison(heldout_a, heldout_b, len(sentences), 0, 0, 0, 0, 0)
    for ta, tb in zip(trees_a, trees_b):
        if ta is None or tb is None:
            continue
        result.both_parsed += 1
        ba, bb = brackets(ta), brackets(tb)
        result.brackets_a += len(ba)
        result.brackets_b += len(bb)
        result.brackets_shared += len(ba & bb)
        result.same_bracketing += ba == bb
    counts, result.labelled_spans = overlap_matrix(trees_a, trees_b, grammar_a.symbols,
                                                   grammar_b.symbols)
    result.matching, result.unmatched_a, result.unmatched_b = match_symbols(
        counts, grammar_a.symbols, grammar_b.symbols)
    return result
