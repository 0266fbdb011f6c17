"""scripts/bench_decode.py: a baseline `decode.py` from git runs beside this tree's engine."""

from __future__ import annotations

import importlib.util
import subprocess
import sys
from pathlib import Path

import pytest
import torch

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_decode", REPO / "scripts" / "bench_decode.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_decode"] = bench
_spec.loader.exec_module(bench)

# The last revision whose decode.py built span tables from log inside and outside tables.
BEFORE_SCALED_TABLES = "a13b663"


def _has_revision(ref: str) -> bool:
    return subprocess.run(["git", "cat-file", "-e", f"{ref}^{{commit}}"], cwd=REPO,
                          capture_output=True).returncode == 0


@pytest.mark.skipif(not _has_revision(BEFORE_SCALED_TABLES),
                    reason="the clone lacks the history (a shallow clone)")
def test_a_baseline_from_before_scaled_span_tables_decodes_as_this_tree():
    # Reference: that revision's own decoder (its trees were checked against enumeration in its
    # own tests), run through the shim on this tree's engine: the same max-rule-product trees
    # as this tree's, scores equal to rounding, on sentences whose floor sends batches through
    # the path that builds span tables for a part of a batch (`_sub_tables` there).
    sys.path.insert(0, str(REPO / "tests"))
    from _grammars import random_grammar
    old = bench.baseline_module(BEFORE_SCALED_TABLES)
    g = random_grammar(6, 6, 5, seed=3, sparsity=0.5,
                       names=([f"S{i // 2}·{i % 2}" for i in range(6)],
                              [f"P{i // 2}·{i % 2}" for i in range(6)]))
    gen = torch.Generator().manual_seed(1)
    sentences = [[f"w{int(k)}" for k in torch.randint(0, 5, (n,), generator=gen)]
                 for n in (12, 9, 2, 7, 11, 3, 10, 8)]
    from treewright import decode
    new = decode.decode(g, sentences, "max-rule-product")
    before = old.decode(g, sentences, "max-rule-product")
    for a, b in zip(new, before, strict=True):
        assert a.tree == b.tree
        assert a.score == pytest.approx(b.score, abs=1e-9)
