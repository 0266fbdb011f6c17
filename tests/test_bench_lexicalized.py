"""scripts/bench_lexicalized.py on a tiny corpus: it trains through the real trainer, and says
when its whole-corpus figure is extrapolated rather than measured (no timing is asserted)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_lexicalized",
                                               REPO / "scripts" / "bench_lexicalized.py")
bench = importlib.util.module_from_spec(_spec)
sys.modules["bench_lexicalized"] = bench
_spec.loader.exec_module(bench)

TINY = ["--override", "model.nonterminals=3", "--override", "model.preterminals=4",
        "--override", "model.head_classes=3", "--override", "model.embedding_dim=8"]


def test_a_sample_is_reported_as_extrapolated_and_a_whole_epoch_as_measured(capsys):
    sample = bench.main(["--sentences", "30", "--measure", "10", "--max-words", "8", *TINY])
    out = capsys.readouterr().out
    assert sample["extrapolated"] and "extrapolated, not measured" in out
    # The whole-corpus figure is the sample's rate applied to the corpus (the stated rule).
    assert sample["epoch_seconds_whole"] == 30 / sample["sentences_per_second"]
    whole = bench.main(["--sentences", "12", "--measure", "12", "--max-words", "8", *TINY])
    out = capsys.readouterr().out
    assert not whole["extrapolated"] and "extrapolated" not in out
    assert "measured: the whole epoch of 12 sentences" in out


def test_the_corpus_is_the_head_final_language_within_the_length_cap():
    # Reference: the demo's generating grammar draws it (scripts/make_headed_language.py draws
    # head-final the same way); every sentence ends with the language's final mark.
    corpus = bench.draw_corpus(50, 20, seed=0)
    assert len(corpus) == 50 and all(1 <= len(s) <= 20 for s in corpus)
    assert corpus == bench.draw_corpus(50, 20, seed=0)
    assert all(s[-1] in {".", "!"} for s in corpus)
