"""Shared pieces of the training tests: a small invented language written as a grammar, corpora
sampled from it, and a brute-force enumerator of every tree of a short sentence.

The language (Velmor, invented for these tests): a sentence is a noun phrase and a verb phrase.
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import torch

from treewright.grammar import Grammar, parse_grammar
from treewright.inference import generate
from treewright.params.tabular import RuleTensors

VELMOR = '''@start ROOT
ROOT -> S 1.0
S -> NP VP 1.0
NP -> D N 0.7
NP -> "kip" 0.3
VP -> V NP 0.6
VP -> "sul" 0.4
D -> "ta" 0.5
D -> "mo" 0.5
N -> "ferro" 0.4
N -> "lanu" 0.3
N -> "vesk" 0.3
V -> "orun" 0.5
V -> "dast" 0.5
'''


def velmor() -> Grammar:
    return parse_grammar(VELMOR)


def write_corpus(folder: Path, train: int = 200, dev: int = 60, seed: int = 1,
                 dev_trees: bool = True) -> tuple[Path, Path]:
    """Sentences sampled from Velmor: raw text for training, trees (or text) for dev."""
    trees = generate(velmor(), train + dev, seed=seed)
    folder.mkdir(parents=True, exist_ok=True)
    train_path, dev_path = folder / "train.txt", folder / "dev.txt"
    train_path.write_text("\n".join(" ".join(t.leaves()) for t in trees[:train]) + "\n")
    dev_lines = [t.to_string() if dev_trees else " ".join(t.leaves()) for t in trees[train:]]
    dev_path.write_text("\n".join(dev_lines) + "\n")
    return train_path, dev_path


def base_overrides(folder: Path, train: Path, dev: Path | None, **extra) -> list[str]:
    """A tiny float64 run: 3 nonterminals, 5 preterminals, no progress or stdout noise."""
    values = {"data.train": train, "model.nonterminals": 3, "model.preterminals": 5,
              "train.dtype": "float64", "train.epochs": 5, "train.batch_size": 50,
              "output.run_dir": folder / "run", "output.progress": "false",
              "output.stdout_metrics": "false", "output.tensorboard": "false"}
    if dev is not None:
        values["data.dev"] = dev
    values.update(extra)
    return [f"{k}={v}" for k, v in values.items()]


def brute_force(rules: RuleTensors, words: list[int], allowed=lambda spans: True):
    """log Z and expected counts by enumerating every tree (brute force; exponential).

    `allowed(spans)` filters trees by their set of spans (i, j) of width >= 2.
    """
    nt, t = rules.binary.shape[0], rules.lexical.shape[0]
    n = len(words)
    total = 0.0
    root = torch.zeros(nt, dtype=torch.float64)
    binary = torch.zeros_like(rules.binary, dtype=torch.float64)
    lexical = torch.zeros_like(rules.lexical, dtype=torch.float64)
    span_mass: dict = {}
    for a, rule_list, spans in _labelled_trees(0, n, nt, t):
        if not allowed(spans):
            continue
        logp = float(rules.root[a])
        for r in rule_list:
            if r[0] == "b":
                logp += float(rules.binary[r[1], r[2], r[3]])
            else:
                logp += float(rules.lexical[r[1], words[r[2]]])
        p = math.exp(logp)
        total += p
        root[a] += p
        for r in rule_list:
            if r[0] == "b":
                binary[r[1], r[2], r[3]] += p
            else:
                lexical[r[1], words[r[2]]] += p
        for s in spans:
            span_mass[s] = span_mass.get(s, 0.0) + p
    return (math.log(total), root / total, binary / total, lexical / total,
            {s: m / total for s, m in span_mass.items()})


def _labelled_trees(i: int, j: int, nt: int, t: int):
    """(top nonterminal, rules, spans) of every tree over i..j-1 whose top is a nonterminal."""
    for top, rule_list, spans in _subtrees(i, j, nt, t):
        if top[0] == "N":
            yield top[1], rule_list, spans


def _subtrees(i: int, j: int, nt: int, t: int):
    if j - i == 1:
        for p in range(t):
            yield ("T", p), [("l", p, i)], frozenset()
        return
    for k in range(i + 1, j):
        lefts = list(_subtrees(i, k, nt, t))
        rights = list(_subtrees(k, j, nt, t))
        for (ltop, lrules_, lspans), (rtop, rrules, rspans) in itertools.product(lefts, rights):
            b = ltop[1] if ltop[0] == "N" else nt + ltop[1]
            c = rtop[1] if rtop[0] == "N" else nt + rtop[1]
            for a in range(nt):
                yield (("N", a), [("b", a, b, c)] + lrules_ + rrules,
                       lspans | rspans | {(i, j)})


def test_velmor_is_a_proper_grammar():
    # The grammar text format checks normalisation on load (grammar.parse_grammar); the
    # generated corpus must use only Velmor's words.
    g = velmor()
    assert g.normalization_error() < 1e-12
    words = {w for t in generate(g, 20, seed=0) for w in t.leaves()}
    assert words <= set(g.vocab.words)
