"""Refinement's held-out set when no held-out tree can be scored: said in the log, not only as
nan in the metrics."""

from __future__ import annotations

import json
import math

from treewright.refine import load_refine_config, refine

# Invented language: training trees put the subject first; the held-out trees put it last, a
# coarse rule (S -> VP NP) that training never saw, so every held-out tree is left out.
TRAIN = ["(S (NP (D ta) (N kip)) (VP (V orun) (N vesk)))",
         "(S (NP (D mo) (N lanu)) (VP (V dast) (N kip)))"]
HELD_OUT = ["(S (VP (V orun) (N kip)) (NP (D ta) (N lanu)))"]


def test_a_held_out_set_with_no_scorable_tree_is_said_in_the_log(tmp_path):
    train, dev = tmp_path / "train.trees", tmp_path / "dev.trees"
    train.write_text("".join(t + "\n" for t in TRAIN * 3), encoding="utf-8")
    dev.write_text("".join(t + "\n" for t in HELD_OUT), encoding="utf-8")
    run = tmp_path / "run"
    cfg = load_refine_config(None, [
        "data.start=treebank", f"data.train={train}", f"data.dev={dev}", "data.rare_count=0",
        "refine.cycles=1", "refine.em_iterations=1", "refine.smoothed_iterations=1",
        "output.tensorboard=false", "output.stdout_metrics=false", f"output.run_dir={run}"])
    refine(cfg, run)
    log = (run / "refine.log").read_text(encoding="utf-8")
    assert "held-out: 1 of 1 trees use a coarse rule unseen in training" in log
    assert "none is left, so the held-out likelihood is not computed" in log
    last = json.loads((run / "metrics.jsonl").read_text().splitlines()[-1])
    # JSON has no NaN: metrics.jsonl writes it as the string "nan".
    assert last["heldout/trees"] == 0 and math.isnan(float(last["heldout/loglik"]))
