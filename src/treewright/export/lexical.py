"""What a lexicalized model (`params.lexicalized`, Yang, Zhao & Tu 2021) learned about words, as
plain records for `inspect` and the report.

`lexical_summary(model, words, nonterminals, preterminals, top)` names the model's own tables:
- `backoff`: per nonterminal, lambda_A, the weight of its word-conditioned rules (1 - lambda_A
  goes to the symbol-only back-off; `LexicalizedParams.backoff_weights`);
- `word_pairs`: the strongest head-dependent word pairs, scored by
  log p(x' | head x) - log p_backoff(x') (`LexicalizedParams.strongest_word_pairs`);
- `head_symbols`: the strongest pairs of a symbol and the head word it carries, scored by
  pointwise mutual information (`LexicalizedParams.strongest_head_symbols`).
Scores are natural logs. `format_lexical_summary` is the terminal text.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import torch

from treewright.params import LexicalizedParams

DEFAULT_PAIRS = 10

WORD_PAIRS_NOTE = ("score: log p(dependent | head) - log p(dependent) under the symbol-only "
                   "back-off, natural log; above 0, the head word makes the dependent likelier")
HEAD_SYMBOLS_NOTE = ("score: pointwise mutual information of a symbol and the head word it "
                     "carries, as the rules draw a dependent child and its word together, "
                     "natural log")
BACKOFF_NOTE = ("lambda: the weight of the nonterminal's word-conditioned rules; 1 - lambda "
                "goes to its symbol-only rules (the back-off)")


@dataclass(frozen=True)
class LexicalSummary:
    """backoff: (nonterminal, lambda) in symbol order; word_pairs: (head word, dependent word,
    score), strongest first; head_symbols: (symbol, word, score), strongest first."""
    backoff: list[tuple[str, float]]
    word_pairs: list[tuple[str, str, float]]
    head_symbols: list[tuple[str, str, float]]


def lexical_summary(model: LexicalizedParams, words: Sequence[str],
                    nonterminals: Sequence[str], preterminals: Sequence[str],
                    top: int = DEFAULT_PAIRS) -> LexicalSummary:
    """The summary of `model`, whose word ids index `words` (its vocabulary's word list) and
    whose symbols are `nonterminals` then `preterminals`; `top` pairs of each kind."""
    names = list(nonterminals) + list(preterminals)
    with torch.no_grad():
        backoff = [(names[a], float(w)) for a, w in enumerate(model.backoff_weights())]
        pairs = [(words[h], words[d], s) for h, d, s in model.strongest_word_pairs(top)]
        symbols = [(names[c], words[x], s) for c, x, s in model.strongest_head_symbols(top)]
    return LexicalSummary(backoff, pairs, symbols)


def format_lexical_summary(summary: LexicalSummary) -> str:
    """Terminal text of the three tables, each under its title and how it is scored."""
    def table(rows, heads):
        widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h)
                  for k, h in enumerate(heads)]
        line = "  " + "  ".join(f"{{:<{w}}}" for w in widths)
        return [line.format(*r).rstrip() for r in [heads, *rows]]

    out = ["lexicalized model: head words (Yang, Zhao & Tu 2021)", "",
           "back-off weight per nonterminal", f"  ({BACKOFF_NOTE})"]
    out += table([(a, f"{w:.3f}") for a, w in summary.backoff], ("symbol", "lambda"))
    out += ["", "strongest head-dependent word pairs", f"  ({WORD_PAIRS_NOTE})"]
    out += table([(f"{s:.3f}", h, d) for h, d, s in summary.word_pairs],
                 ("score", "head", "dependent"))
    out += ["", "strongest head-symbol pairs", f"  ({HEAD_SYMBOLS_NOTE})"]
    out += table([(f"{s:.3f}", c, x) for c, x, s in summary.head_symbols],
                 ("score", "symbol", "head word"))
    return "\n".join(out) + "\n"
