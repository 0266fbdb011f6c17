"""Refinement's held-out set when no held-out tree can be scored: said in the log, not only as
nan in the metrics."""

from __future__ import annotations

import json
import math

from _treebank import refine_on_trees

# Invented language: training trees put the subject first; the held-out trees put it last, a
# coarse rule (S -> VP NP) that training never saw, so every held-out tree is left out.
TRAIN = ["(S (NP (D ta) (N kip)) (VP (V orun) (N vesk)))",
         "(S (NP (D mo) (N lanu)) (VP (V dast) (N kip)))"]
HELD_OUT = ["(S (VP (V orun) (N kip)) (NP (D ta) (N lanu)))"]


def test_a_held_out_set_with_no_scorable_tree_is_said_in_the_log(tmp_path):
    run, _, _ = refine_on_trees(tmp_path, TRAIN * 3, HELD_OUT, em_iterations=1)
    log = (run / "refine.log").read_text(encoding="utf-8")
    assert "held-out: 1 of 1 trees use a coarse rule unseen in training" in log
    assert "none is left, so the held-out likelihood is not computed" in log
    last = json.loads((run / "metrics.jsonl").read_text().splitlines()[-1])
    # JSON has no NaN: metrics.jsonl writes it as the string "nan".
    assert last["heldout/trees"] == 0 and math.isnan(float(last["heldout/loglik"]))
