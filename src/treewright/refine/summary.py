"""An interpretable summary of a refined grammar: per subcategory, how often it is used and its
most probable words (symbols with word rules) or rules (symbols with binary rules)."""

from __future__ import annotations

import torch
from torch import Tensor

from treewright.refine.latent import LatentGrammar, fine_name


def subcategory_summary(lg: LatentGrammar, usage: Tensor, top: int = 5) -> list[dict]:
    """One record per subcategory, in symbol order.

    usage: (S, K) expected number of nodes (or uses) of each subcategory in training.
    Each record: {"name", "symbol", "uses", "share" (of the symbol's uses), "words": [(word, p)],
    "rules": [(rule text, p)]}; words and rules are the `top` most probable.
    """
    records = []
    words = lg.vocab.words
    for s, symbol in enumerate(lg.symbols):
        n = int(lg.splits[s])
        total = float(usage[s, :n].sum())
        rows_b = (lg.rules[:, 0] == s).nonzero().flatten()
        rows_l = (lg.words[:, 0] == s).nonzero().flatten()
        for x in range(n):
            record = {"name": fine_name(symbol, x), "symbol": symbol,
                      "uses": float(usage[s, x]),
                      "share": float(usage[s, x]) / total if total > 0 else 0.0}
            if len(rows_l):
                p = lg.lexical[rows_l, x]
                best = torch.argsort(p, descending=True, stable=True)[:top]
                record["words"] = [(words[int(lg.words[rows_l[i], 1])], float(p[i]))
                                   for i in best if p[i] > 0]
            if len(rows_b):
                block = lg.binary[rows_b, x]                                # (r, K, K)
                flat = block.flatten()
                best = torch.argsort(flat, descending=True, stable=True)[:top]
                K = lg.width
                rules = []
                for i in best.tolist():
                    if flat[i] <= 0:
                        break
                    r, rest = divmod(i, K * K)
                    y, z = divmod(rest, K)
                    _, b, c = lg.rules[rows_b[r]].tolist()
                    rules.append((f"{fine_name(lg.symbols[b], y)} {fine_name(lg.symbols[c], z)}",
                                  float(flat[i])))
                record["rules"] = rules
            records.append(record)
    return records


def summary_text(records: list[dict]) -> str:
    lines = ["# subcategory  uses  share-of-symbol  then its most probable words / rules"]
    for r in records:
        lines.append(f"{r['name']}  {r['uses']:.1f}  {100 * r['share']:.1f}%")
        if r.get("words"):
            lines.append("    words: " + ", ".join(f"{w} {p:.3f}" for w, p in r["words"]))
        if r.get("rules"):
            lines.append("    rules: " + ", ".join(f"{t} {p:.3f}" for t, p in r["rules"]))
    return "\n".join(lines) + "\n"
