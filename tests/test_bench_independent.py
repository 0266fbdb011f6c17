"""scripts/bench_independent.py: its matrix-product floor counts exactly the matrix products the
engine makes, and a smoke run reports figures by the stated rules (no timing is asserted)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest
from torch.utils.flop_counter import FlopCounterMode

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_independent",
                                               REPO / "scripts" / "bench_independent.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_independent"] = bench
_spec.loader.exec_module(bench)


@pytest.mark.parametrize("nt, t, n, batch", [(6, 10, 7, 3), (5, 3, 4, 2), (8, 16, 12, 2)])
def test_the_floor_counts_every_matrix_product_of_a_forward_backward(nt, t, n, batch):
    # Reference: torch's own flop counter over one forward+backward. Its matrix products (mm)
    # are the floor, and they are all it counts: the split sums, which the floor leaves out,
    # run in a compiled loop (engine.lowrank), outside torch's operators.
    problem = bench.random_problem(nt, t, n, batch)
    with FlopCounterMode(display=False) as counter:
        bench.forward_backward(problem)
    counts = {str(k): v for k, v in counter.get_flop_counts()["Global"].items()}
    assert counts == {"aten.mm": bench.independent_work(nt, t, n) * batch}


def test_a_quick_run_reports_its_figures_by_the_stated_rules(capsys):
    r = bench.main(["--quick", "--threads", "1"])
    assert r["matmul_gflop"] == bench.independent_work(r["nt"], r["t"], r["n"]) * r["batch"] / 1e9
    assert r["floor_s"] == r["matmul_gflop"] / r["matmul_gflops"]
    assert r["ratio"] == r["fb_s"] / r["floor_s"]
    assert f"ratio {r['ratio']:.2f} (target <= 2)" in capsys.readouterr().out


def test_a_quick_epoch_reports_its_figures_by_the_stated_rules(capsys):
    r = bench.main(["--quick", "--epoch", "--threads", "1"])
    # Reference: length_batches with only a sentence limit cuts ceil(sentences / batch) batches
    # (its docstring: sorted by length, cut greedily at the limit).
    assert r["batches"] == -(-r["sentences"] // r["batch"])
    assert r["sentences"] < bench.TARGET_SENTENCES
    assert r["extrapolated_epoch_s"] == r["epoch_s"] * bench.TARGET_SENTENCES / r["sentences"]
    assert r["sent_per_s"] == r["sentences"] / r["epoch_s"]
    # A per-word log-likelihood of a proper grammar is a log-probability: below zero.
    assert r["loglik_per_word"] < 0
    out = capsys.readouterr().out
    assert "extrapolated" in out and "not measured" in out


def test_a_quick_epoch_then_parse_decodes_every_sentence_with_a_parse(capsys):
    import random
    r = bench.main(["--quick", "--epoch", "--parse", "--threads", "1"])
    # The corpus again, by the module docstring's rule (seeded lengths 1 to --max-length). In
    # the induction layout (preterminals alone emit words, the top symbol is a nonterminal) a
    # one-word sentence has no tree and every longer one has one (common practice).
    rng = random.Random(0)
    lengths = [len([rng.randrange(r["vocab"]) for _ in range(rng.randint(1, r["max_length"]))])
               for _ in range(r["sentences"])]
    assert r["parsed"] == sum(n >= 2 for n in lengths) < r["sentences"]
    assert r["parse_ratio"] == r["epoch_s"] / r["parse_s"]
    assert r["parse_sent_per_s"] == r["sentences"] / r["parse_s"]
    out = capsys.readouterr().out
    assert "parse (mbr, the trained model" in out
    # max-rule-product on the same model: timed by the same rules, the same sentences parsed
    # (every factor is positive, so each sentence with a parse has a tree under it too).
    assert r["mrp_parsed"] == r["parsed"]
    assert r["mrp_ratio"] == r["epoch_s"] / r["mrp_s"]
    assert "parse (max-rule-product, the trained model" in out


def test_a_trained_run_is_decoded_beside_an_epoch_of_its_sizes(tmp_path, capsys):
    # `--run RUN --text FILE`: the run's own model decodes the first --sentences lines of FILE
    # of at most --max-length words (a run trained here: 6/10 symbols, one epoch, on demo text),
    # beside a training epoch of a model of the run's sizes on the same sentences.
    from test_train_fixtures import base_overrides, write_corpus
    from treewright.decode import decode
    from treewright.grammar import load_grammar
    from treewright.train import load_train_config, train
    train_path, _ = write_corpus(tmp_path / "data", train=40, dev=0)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, None, **{"train.method": "gradient",
                                       "model.parameterization": "independent",
                                       "model.nonterminals": 6, "model.preterminals": 10,
                                       "train.epochs": 1, "train.batch_size": 20}))
    train(cfg, tmp_path / "run")
    r = bench.main(["--epoch", "--parse", "--run", str(tmp_path / "run"), "--text",
                    str(train_path), "--sentences", "25", "--max-length", "8", "--threads", "1"])
    lines = [x.split() for x in train_path.read_text().splitlines()]
    chosen = [w for w in lines if 1 <= len(w) <= 8][:25]
    assert (r["sentences"], r["words"], r["nt"], r["t"]) == \
        (len(chosen), sum(map(len, chosen)), 6, 10)
    # Reference: max-rule-product on the run's grammar file (the dense rules the factors
    # imply; checked against enumeration in test_decode.py) parses the same sentences.
    want = decode(load_grammar(tmp_path / "run" / "grammar.pcfg"), chosen, "max-rule-product")
    assert r["mrp_parsed"] == r["parsed"] == sum(d.tree is not None for d in want)
    assert r["mrp_ratio"] == r["epoch_s"] / r["mrp_s"]
    assert "decoding with the trained model of" in capsys.readouterr().out
