"""Data-parallel training (torch.distributed, gloo on loopback): the cost-balanced deal of
sentences, and runs of 1, 2 and 3 worker processes against the single-process trainer.

Reference for every multi-process check: the single-process trainer itself (LocalWorld), whose
EM, VB, online EM and gradient updates the other tests check against brute force. Summation
order differs between worker counts, so grammars agree to 1e-6 in float64 (the issue's
tolerance), not bit for bit.
"""

from __future__ import annotations

import itertools
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from test_train_fixtures import base_overrides, write_corpus
from treewright.corpus import cubic_cost
from treewright.train import load_train_config, train
from treewright.train.distributed import balanced_shards

# Worker processes get one torch thread each: the machine's 2 cores are shared.
ENV = {**os.environ, "OMP_NUM_THREADS": "1"}


def _loads(shards, lengths):
    return [sum(cubic_cost(lengths[i]) for i in shard) for shard in shards]


# ---------------------------------------------------------------------------------------------
# The deal


@pytest.mark.parametrize("parts", [1, 2, 3])
def test_each_sentence_lands_in_exactly_one_shard_in_its_order(parts):
    lengths = [7, 3, 12, 3, 9, 1, 15, 4, 4, 8, 2, 11, 6]
    indices = [5, 0, 12, 3, 9, 1, 7, 2, 10, 4, 11, 6, 8]
    shards = balanced_shards(indices, lengths, parts)
    assert len(shards) == parts
    # Each index exactly once (the issue: every sentence used once per epoch across workers).
    assert sorted(i for s in shards for i in s) == sorted(indices)
    for shard in shards:   # a shard keeps the order of the batch it came from
        assert shard == [i for i in indices if i in shard]
    assert balanced_shards(indices, lengths, parts) == shards   # deterministic


def test_the_deal_balances_cost_not_count():
    # One long sentence and three short ones: splitting by count would pair the long one with
    # a short one; by cost (n^3, common practice for the inside pass) it stands alone.
    lengths = [10, 1, 1, 1]
    shards = balanced_shards([0, 1, 2, 3], lengths, 2)
    assert sorted(_loads(shards, lengths)) == [3, 1000]


@pytest.mark.parametrize("seed", range(6))
def test_the_largest_load_is_within_graham_bound_of_the_best(seed):
    # Reference: brute force over every assignment of 8 sentences to 3 workers, and Graham's
    # (1969) bound for longest-processing-time-first, 4/3 - 1/(3m) of the optimum (from memory).
    import random
    rng = random.Random(seed)
    lengths = [rng.randint(1, 20) for _ in range(8)]
    parts = 3
    best = min(max(sum(cubic_cost(lengths[i]) for i in range(8) if owner[i] == p)
                   for p in range(parts))
               for owner in itertools.product(range(parts), repeat=8))
    got = max(_loads(balanced_shards(list(range(8)), lengths, parts), lengths))
    assert best <= got <= (4 / 3 - 1 / (3 * parts)) * best


# ---------------------------------------------------------------------------------------------
# Runs with several worker processes


def _overrides(tmp_path, run: str, **extra):
    train_path, dev_path = write_corpus(tmp_path / "data", train=90, dev=20)
    values = {"train.epochs": 3, "train.batch_size": 16, "output.run_dir": tmp_path / run}
    values.update(extra)
    return base_overrides(tmp_path, train_path, dev_path, **values)


def _cli(args, timeout=240) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "treewright", "train", *map(str, args)],
                          env=ENV, capture_output=True, text=True, timeout=timeout)


def _rules(path: Path) -> dict[str, float]:
    """Rule -> probability from a grammar file ('LHS -> RHS... prob' lines)."""
    out = {}
    for line in path.read_text().splitlines():
        if "->" in line and not line.startswith(("#", "@")):
            *rule, prob = line.split()
            out[" ".join(rule)] = float(prob)
    return out


def _curve(run: Path, key: str = "train/loglik_per_word") -> list[float]:
    lines = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    return [x[key] for x in lines if key in x]


def _assert_same_run(reference: Path, other: Path, key: str = "train/loglik_per_word"):
    a, b = _rules(reference / "grammar.pcfg"), _rules(other / "grammar.pcfg")
    assert a.keys() == b.keys()
    assert max(abs(a[r] - b[r]) for r in a) < 1e-6
    curve_a, curve_b = _curve(reference, key), _curve(other, key)
    assert len(curve_a) == len(curve_b) > 0
    assert curve_a == pytest.approx(curve_b, rel=1e-9, abs=1e-9)


def _single(tmp_path, **extra) -> Path:
    cfg = load_train_config(None, _overrides(tmp_path, "single", **extra))
    train(cfg, tmp_path / "single")
    return tmp_path / "single"


def _workers(tmp_path, n: int, **extra) -> Path:
    run = tmp_path / f"workers-{n}"
    config = tmp_path / "config.yaml"
    config.write_text("{}\n")   # everything is in the overrides
    done = _cli(["--workers", n, config, *_overrides(tmp_path, run.name, **extra)])
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines() == [str(run / "grammar.pcfg")]  # rank 0 only
    return run


def test_two_workers_give_the_single_process_em_grammar_and_curve(tmp_path):
    single = _single(tmp_path)
    two = _workers(tmp_path, 2)
    _assert_same_run(single, two)
    # Only rank 0 wrote the run folder: one line per step, as many as the single process.
    assert len((two / "metrics.jsonl").read_text().splitlines()) == \
        len((single / "metrics.jsonl").read_text().splitlines())
    assert (two / "train.log").read_text().count("kept restart") == 1


@pytest.mark.slow
@pytest.mark.parametrize("n", [1, 3])
def test_one_and_three_workers_give_the_single_process_em_grammar(tmp_path, n):
    _assert_same_run(_single(tmp_path), _workers(tmp_path, n))


@pytest.mark.slow
@pytest.mark.parametrize("extra,key", [
    ({"train.method": "vb", "prior.concentration": 0.5}, "train/elbo_per_word"),
    ({"train.method": "online_em"}, "train/loglik_per_word"),
    ({"train.method": "gradient", "optimizer.lr": 0.05}, "train/loglik_per_word"),
], ids=["vb", "online_em", "gradient"])
def test_two_workers_match_the_single_process_for_every_method(tmp_path, extra, key):
    # Batch size 16 over 2 workers, and batches of 90 % 16 = 10 at the end of an epoch, so
    # shards of unequal size; the last check is the gradient's Adam steps in lockstep.
    _assert_same_run(_single(tmp_path, **extra), _workers(tmp_path, 2, **extra), key)


def test_bad_worker_counts_and_streaming_combinations_are_refused(tmp_path):
    from treewright.config import ConfigError
    config = tmp_path / "config.yaml"
    config.write_text("{}\n")
    done = _cli(["--workers", 0, config, *_overrides(tmp_path, "zero")])
    assert done.returncode == 1 and "--workers must be at least 1, got 0" in done.stderr
    assert not (tmp_path / "zero").exists()          # refused before any work
    # Streaming feeds online EM's minibatches; batch EM needs the whole corpus per update.
    with pytest.raises(ConfigError) as info:
        load_train_config(None, _overrides(tmp_path, "em", **{"data.stream_chunk": 10}))
    assert [p.key for p in info.value.problems] == ["data.stream_chunk"]
