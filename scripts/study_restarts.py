"""Restart choice without gold trees (issue 21), offline, from the run folders that
scripts/bench_induction.py leaves on a generated word order (--data head-final/head-initial).

    .venv/bin/python scripts/study_restarts.py runs/bench_hf0 runs/bench_hi0 --sample 500

Each argument is one benchmark output folder (its results.json, train.txt and the run folders
with every restart's grammar). For every run the script compares, against the test F1 of each
restart (gold: the generating trees, known only to the benchmark), what several criteria that
need no gold trees would have chosen:

- likelihood: the final training objective per word (what training keeps today without a dev
  set);
- agreement: the medoid restart, whose MBR trees on a seeded sample of training sentences have
  the highest mean sentence F1 against the other restarts' trees on the same sentences;
- unambiguity: the restart whose MBR trees carry the most of their own posterior mass (mean over
  the sample of the summed span posteriors of the MBR tree over its n - 1 spans), after Tu &
  Honavar 2012, "Unambiguity regularization for unsupervised learning of probabilistic
  grammars": natural-language grammars are far less ambiguous than the grammars EM finds.

and it scores the tree average of the restarts (Shayegh, Cao, Zhu, Cheung & Mou 2024,
"Ensemble Distillation for Unsupervised Constituency Parsing"): per test sentence, the binary
tree that maximizes the summed F1 against each restart's MBR tree (`decode.tree_average`).

Prints a Markdown table and writes <folder>/restart_study.json. Asserts nothing.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import math
import random
import statistics
import sys
import tempfile
from pathlib import Path

import torch

from treewright import engine
from treewright.allocator import tune_allocator
from treewright.corpus import length_batches
from treewright.decode import mbr_spans, tree_average
from treewright.evaluation import BracketConventions, Bracketing, evaluate_brackets
from treewright.grammar import load_grammar
from treewright.inference import encode
from treewright.runfolder import RunFolder

HERE = Path(__file__).resolve().parent
_spec = importlib.util.spec_from_file_location("bench_induction", HERE / "bench_induction.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_induction"] = bench
_spec.loader.exec_module(bench)

CRITERIA = ("likelihood", "agreement", "unambiguity")


def mbr_and_confidence(grammar, sentences: list[list[str]], batch_size: int = 32
                       ) -> tuple[list[list[tuple[int, int]]], list[float | None]]:
    """Per sentence: the MBR spans (width >= 2, whole sentence included; [] when unparsed) and
    the mean posterior of those n - 1 spans under the grammar (None for one word or no parse)."""
    spans: list = [[] for _ in sentences]
    confidence: list = [None] * len(sentences)
    for batch in length_batches([len(s) for s in sentences], max_sentences=batch_size):
        enc = encode(grammar, [sentences[i] for i in batch], torch.float64)
        with torch.no_grad():
            post = engine.posteriors(grammar.root.double(), grammar.binary.double(),
                                     enc.terminal, enc.lengths, enc.nt_terminal)
        for k, i in enumerate(batch):
            n = len(sentences[i])
            if not math.isfinite(float(post.logz[k])):
                continue
            best = mbr_spans(post.spans[k], n)     # post.spans[k]: (N+1, N+1) [start, width]
            spans[i] = best
            if n >= 2:
                confidence[i] = sum(float(post.spans[k][a, b - a]) for a, b in best) / (n - 1)
    return spans, confidence


def inner(spans: list[tuple[int, int]], n: int) -> set[tuple[int, int]]:
    """The spans bracket F1 counts: width >= 2, the whole sentence left out."""
    return {(i, j) for i, j in spans if j - i >= 2 and (i, j) != (0, n)}


def pair_f1(a: list, b: list, lengths: list[int]) -> float:
    """Mean sentence F1 of tree set `a` against tree set `b` (sentences with a counted span)."""
    scores = []
    for x, y, n in zip(a, b, lengths):
        x, y = inner(x, n), inner(y, n)
        if x or y:
            scores.append(2 * len(x & y) / (len(x) + len(y)))
    return statistics.fmean(scores) if scores else 0.0


def f1_of(spans_per_sentence: list, ev) -> float:
    pred = [Bracketing.from_spans(t, s or []) for s, t in zip(spans_per_sentence, ev.tokens)]
    return evaluate_brackets(pred, ev.gold, BracketConventions()).to_dict()[
        "systems"]["model"]["sentence_f1"]


def study(folder: Path, sample: int, seed: int) -> list[dict]:
    results = json.loads((folder / "results.json").read_text(encoding="utf-8"))
    order, counts = results["data"], results["counts"]
    with tempfile.TemporaryDirectory() as tmp:
        data = bench.generated_data(order, Path(tmp), counts["train"], counts["test_scored"],
                                    counts["max_words"], counts["data_seed"])
    ev = data.evals[0]
    rng = random.Random(seed)
    picked = sorted(rng.sample(range(len(data.train_tokens)), min(sample, len(data.train_tokens))))
    train_sample = [data.train_tokens[i] for i in picked]
    lengths = [len(s) for s in train_sample]
    out = []
    for run in results["runs"]:
        run_dir = folder / f"{run['method']}-seed{run['seed']}"
        restarts = run["restarts"]
        train_trees, confidence, test_trees, test_f1 = [], [], [], []
        for r in restarts:
            grammar = load_grammar(RunFolder(run_dir).restart_grammar(r["restart"]),
                                   tolerance=1e-4)
            spans, conf = mbr_and_confidence(grammar, train_sample)
            train_trees.append(spans)
            confidence.append(statistics.fmean(c for c in conf if c is not None))
            spans, _ = mbr_and_confidence(grammar, ev.tokens)
            test_trees.append(spans)
            test_f1.append(r["scores"][ev.name]["model"]["sentence_f1"])
        k = len(restarts)
        agreement = [statistics.fmean(pair_f1(train_trees[a], train_trees[b], lengths)
                                      for b in range(k) if b != a) for a in range(k)]
        likelihood = [r["final_objective_per_word"] for r in restarts]
        scores = {"likelihood": likelihood, "agreement": agreement, "unambiguity": confidence}
        chosen = {c: max(range(k), key=lambda a: scores[c][a]) for c in CRITERIA}
        averaged = [tree_average([t[s] for t in test_trees], len(ev.tokens[s]))
                    for s in range(len(ev.tokens))]
        out.append({"order": order, "seed": run["seed"], "restart_f1": test_f1,
                    "kept_by_training": run["best_restart"],
                    "criteria": scores, "chosen": chosen,
                    "chosen_f1": {c: test_f1[a] for c, a in chosen.items()},
                    "oracle_f1": max(test_f1), "tree_average_f1": f1_of(averaged, ev),
                    "perplexity": [r["scores"][ev.name]["perplexity"] for r in restarts],
                    "ceiling_perplexity": results["ceiling"][ev.name]["perplexity"],
                    "sample": len(train_sample)})
    (folder / "restart_study.json").write_text(json.dumps(out, indent=2) + "\n",
                                               encoding="utf-8")
    return out


def table(rows: list[dict]) -> str:
    lines = ["| order | seed | restart F1 (0-3) | likelihood | agreement | unambiguity "
             "| tree average | best restart |", "|---|---|---|---|---|---|---|---|"]
    for r in rows:
        per = " / ".join(f"{100 * f:.1f}" for f in r["restart_f1"])
        cells = " | ".join(f"{100 * r['chosen_f1'][c]:.1f} (#{r['chosen'][c]})"
                           for c in CRITERIA)
        lines.append(f"| {r['order']} | {r['seed']} | {per} | {cells} | "
                     f"{100 * r['tree_average_f1']:.1f} | {100 * r['oracle_f1']:.1f} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> list[dict]:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("folders", nargs="+", type=Path, help="bench_induction output folders")
    p.add_argument("--sample", type=int, default=500, help="training sentences decoded for "
                   "the agreement and unambiguity criteria")
    p.add_argument("--seed", type=int, default=0, help="seed of that sample")
    p.add_argument("--threads", type=int, default=1)
    args = p.parse_args(argv)
    tune_allocator()
    torch.set_num_threads(args.threads)
    rows = []
    for folder in args.folders:
        rows += study(folder, args.sample, args.seed)
    print(table(rows))
    return rows


if __name__ == "__main__":
    main()
