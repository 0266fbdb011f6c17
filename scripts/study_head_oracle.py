"""Study (issue 22): how far could a lexicalized run's heads go within its own trees?

    OMP_NUM_THREADS=1 .venv/bin/python scripts/study_head_oracle.py --data turkish \\
        --mode tokens runs/bench/lexicalized-seed0 [RUN ...]
    OMP_NUM_THREADS=1 .venv/bin/python scripts/study_head_oracle.py --data head-final \\
        --max-length 40 runs/hf/lexicalized-seed0

A lexicalized run's heads can be wrong for two reasons: its trees do not hold a word's
dependents together with it, or its trees do and it chose the wrong child as head. This script
tells them apart. For each run it parses an eval set of `scripts/bench_induction.py` (the same
sentences and words the benchmark scores, built by the benchmark's own functions from the same
flags) and prints the directed attachment of the best derivations' heads, as the benchmark
scores them, beside the best directed attachment any choice of heads could reach within the
same trees: at every binary node either child may head, and a word's arc counts when it is its
gold arc (`best_heads_within`, a dynamic program over each tree; the tests check it against
every head choice of small trees). The same bound is printed for the left-branching and the
right-branching tree of every sentence. When a run's bound is below a chain baseline, no head
choice within its trees passes that chain: the trees, not the heads, hold it back.

Scored words and gold heads follow `evaluation.evaluate_attachment` (punctuation taken out of
the gold tree by its default conventions, heads passing through punctuation to the first word
above that is not), and the directed column is its figure. The bound is taken over each tree
with its punctuation leaves removed, as brackets are recomputed without punctuation. A
sentence the model cannot parse counts all its words wrong in both columns. Prints the
figures and returns them; asserts nothing.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path
from typing import Sequence

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_induction import ORDERS, generated_data, turkish_data  # noqa: E402
from treewright.evaluation import BracketConventions, evaluate_attachment  # noqa: E402
from treewright.evaluation.dependencies import (past_punctuation,  # noqa: E402
                                                punctuation_marks)

# A binary tree over word positions: a leaf is an int (0-based word position), a node a pair
# (left subtree, right subtree).
Shape = int | tuple


def best_heads_within(shape: Shape, gold: Sequence[int]) -> int:
    """The most words whose head can be their gold head, over every choice of heads within the
    binary tree `shape` (at each node, the head word of either child heads the node, and the
    other child's head word depends on it; the tree's head word depends on the root, 0).
    gold: per word, its gold head, 1-based, 0 for the root. O(n^3) over the tree's nodes."""
    def best(node) -> dict[int, int]:
        # head word (1-based) of this subtree -> most gold arcs inside it with that head
        if isinstance(node, int):
            return {node + 1: 0}
        left, right = best(node[0]), best(node[1])
        out: dict[int, int] = {}
        for heads, deps in ((left, right), (right, left)):
            for h, a in heads.items():
                top = max(b + (gold[d - 1] == h) for d, b in deps.items())
                out[h] = max(out.get(h, -1), a + top)
        return out

    return max(v + (gold[h - 1] == 0) for h, v in best(shape).items())


def tree_shape(tree) -> Shape:
    """A decoded tree (preterminals over the words; unary chains allowed) as a `Shape`."""
    position = [0]

    def walk(node):
        if node.is_preterminal():
            position[0] += 1
            return position[0] - 1
        kids = [walk(child) for child in node.children]
        if len(kids) == 1:
            return kids[0]
        if len(kids) != 2:
            raise ValueError(f"a node with {len(kids)} children: not a binary tree")
        return kids[0], kids[1]

    return walk(tree)


def branching(n: int, left: bool) -> Shape:
    """The left-branching (((0 1) 2) ...) or right-branching (0 (1 (2 ...))) tree of n words."""
    if left:
        shape: Shape = 0
        for k in range(1, n):
            shape = (shape, k)
        return shape
    shape = n - 1
    for k in range(n - 2, -1, -1):
        shape = (k, shape)
    return shape


def restrict(shape: Shape, keep: dict[int, int]) -> Shape | None:
    """The tree over the words in `keep` (old position -> new position) alone: the other
    leaves dropped and every node left with one child replaced by it, as brackets are
    recomputed without punctuation. None when no word is kept."""
    if isinstance(shape, int):
        return keep.get(shape)
    left, right = restrict(shape[0], keep), restrict(shape[1], keep)
    if left is None or right is None:
        return right if left is None else left
    return left, right


def scored_gold(gold, conventions: BracketConventions) -> tuple[list[int], list[int]]:
    """One gold sentence's scored words (0-based positions in the whole sentence) and their gold
    heads among them (1-based within the scored words, 0 for the root), as
    `evaluate_attachment` scores them: punctuation taken out, heads passed through it."""
    marks = punctuation_marks(gold, conventions)
    kept = [k for k, mark in enumerate(marks) if not mark]
    truth = past_punctuation(gold.heads, marks)
    index = {k + 1: i for i, k in enumerate(kept, start=1)}
    return kept, [index[truth[k]] if truth[k] else 0 for k in kept]


def main(argv: list[str] | None = None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("runs", nargs="+", type=Path, help="lexicalized run folders")
    p.add_argument("--data", choices=("turkish",) + ORDERS, default="turkish")
    p.add_argument("--mode", choices=("tokens", "tags"), default="tokens")
    p.add_argument("--eval", default=None, help="eval set name (default: the benchmark's last: "
                   "wiki for turkish, <order>-test for the invented languages)")
    p.add_argument("--train-sentences", type=int, default=5000)
    p.add_argument("--test-sentences", type=int, default=500)
    p.add_argument("--max-length", type=int, default=15, help="the benchmark's --max-length "
                   "(the invented languages' longest drawn sentence)")
    p.add_argument("--data-seed", type=int, default=0)
    p.add_argument("--selection", type=float, default=0.0)
    p.add_argument("--threads", type=int, default=1)
    args = p.parse_args(argv)
    torch.set_num_threads(args.threads)
    from treewright.induce import load_lexicalized
    if args.data == "turkish":
        data = turkish_data(args.mode, 0.1, None)
    else:
        with tempfile.TemporaryDirectory() as out:
            data = generated_data(args.data, Path(out), args.train_sentences,
                                  args.test_sentences, args.max_length, args.data_seed,
                                  args.selection)
    evals = {ev.name: ev for ev in data.evals}
    ev = evals[args.eval] if args.eval else data.evals[-1]
    conventions = BracketConventions()
    scored = [scored_gold(g, conventions) for g in ev.dependencies]
    words = sum(len(g) for _, g in scored)
    out: dict = {"eval": ev.name, "words": words, "runs": {}}
    for name, left in (("left-branching", True), ("right-branching", False)):
        bound = sum(best_heads_within(branching(len(g), left), g) for _, g in scored if g)
        out[name] = bound / words
        print(f"{ev.name}, {words} words: best heads within {name} trees "
              f"{100 * bound / words:.1f}")
    for run in args.runs:
        parses = load_lexicalized(run).parse(ev.tokens)
        directed = evaluate_attachment([p.heads or None for p in parses], ev.dependencies,
                                       conventions).systems["model"].directed
        bound = 0
        for parse, tokens, (kept, g) in zip(parses, ev.tokens, scored):
            if parse.tree is None or not g:   # unparsed, or nothing left to score
                continue
            # The eval set's tokens are the whole sentence (invented languages) or its words
            # left without punctuation (Turkish, as its models were trained).
            keep = {k: i for i, k in enumerate(kept)} if len(tokens) != len(kept) else \
                {i: i for i in range(len(kept))}
            bound += best_heads_within(restrict(tree_shape(parse.tree), keep), g)
        out["runs"][str(run)] = {"directed": directed, "bound": bound / words}
        print(f"{run}: directed {100 * directed:.1f}, best heads within its own trees "
              f"{100 * bound / words:.1f}", flush=True)
    return out


if __name__ == "__main__":
    main()
