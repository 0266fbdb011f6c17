"""Streaming online EM (data.stream_chunk): the corpus read chunk by chunk, on one worker or two.

References: the in-memory trainer (same batches when one chunk holds the corpus), the streamed
run without interruption (resume), the stream's own plan (every sentence once per epoch), and
tracemalloc for memory that stays flat as the corpus grows ten times.
"""

from __future__ import annotations

import tracemalloc

import pytest

from test_distributed import _assert_same_run, _overrides, _single, _workers
from test_train_fixtures import write_corpus
from treewright.corpus import ReadOptions, read_corpus
from treewright.train import Trainer, load_train_config, resume
from treewright.train.distributed import StreamedCorpus

ONLINE = {"train.method": "online_em"}


def test_one_chunk_holding_the_corpus_gives_the_in_memory_run_bit_for_bit(tmp_path):
    # Reference: the in-memory online EM run; with a single chunk the streamed plan is the very
    # same list of shuffled batches, so the grammar file is byte-identical.
    single = _single(tmp_path, **ONLINE)
    cfg = load_train_config(None, _overrides(tmp_path, "stream", **ONLINE,
                                             **{"data.stream_chunk": 1000}))
    Trainer(cfg, tmp_path / "stream").run()
    assert (tmp_path / "stream/grammar.pcfg").read_bytes() == \
        (single / "grammar.pcfg").read_bytes()


def test_every_sentence_is_in_one_batch_per_epoch_and_ids_match_the_file(tmp_path):
    train_path, _ = write_corpus(tmp_path / "data", train=95, dev=5)
    corpus = read_corpus(train_path, "text", ReadOptions())
    whole = [corpus.encode(s) for s in corpus.sentences]     # reference: the in-memory read
    stream = StreamedCorpus(train_path, "text", ReadOptions(), chunk_size=20)
    assert len(stream) == len(whole) == 95
    assert list(stream) == whole
    for cap in (None, 3):
        plan = stream.epoch_plan(cap, batch_size=8, shuffle=True, seed=4)
        seen = [i for k in range(len(plan)) for i in plan[k]]
        expected = [i for i in range(95) if cap is None or len(whole[i]) <= cap]
        assert sorted(seen) == expected and plan.sentences == len(expected)
        for k in range(len(plan)):   # a batch never mixes chunks, and holds the file's ids
            assert len({i // 20 for i in plan[k]}) == 1
            assert [stream[i] for i in plan[k]] == [whole[i] for i in plan[k]]
    assert stream.vocabulary.words == corpus.vocabulary.words


def test_a_streamed_run_resumed_mid_epoch_ends_with_the_same_bits(tmp_path):
    # Reference: the same streamed run without interruption; the resumed one re-reads the
    # file up to the recorded batch.
    extra = {**ONLINE, "data.stream_chunk": 25}
    whole = load_train_config(None, _overrides(tmp_path, "whole", **extra))
    Trainer(whole, tmp_path / "whole").run()
    cut = load_train_config(None, _overrides(tmp_path, "cut", **extra))
    finished = Trainer(cut, tmp_path / "cut").run(max_steps=4)
    while not finished:
        _, finished = resume(tmp_path / "cut", max_steps=4)
    assert (tmp_path / "cut/grammar.pcfg").read_bytes() == \
        (tmp_path / "whole/grammar.pcfg").read_bytes()


@pytest.mark.slow
def test_two_streaming_workers_match_one(tmp_path):
    # Reference: the single-process streamed run; chunks of 25 and minibatches of 16.
    extra = {**ONLINE, "data.stream_chunk": 25}
    _assert_same_run(_single(tmp_path, **extra), _workers(tmp_path, 2, **extra))


def _peak_bytes(path, chunk: int) -> int:
    tracemalloc.start()
    try:
        stream = StreamedCorpus(path, "text", ReadOptions(), chunk_size=chunk)
        plan = stream.epoch_plan(None, batch_size=16, shuffle=True, seed=0)
        for k in range(len(plan)):
            [stream[i] for i in plan[k]]
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.slow
def test_memory_stays_flat_when_the_corpus_grows_tenfold(tmp_path):
    # Reference: Python's own allocation tracer. Reading the whole corpus grows with it (the
    # in-memory read is the control); the stream's peak stays near one chunk's worth.
    small, _ = write_corpus(tmp_path / "small", train=2_000, dev=1)
    large, _ = write_corpus(tmp_path / "large", train=20_000, dev=1)
    stream_small, stream_large = _peak_bytes(small, 200), _peak_bytes(large, 200)
    assert stream_large < 1.5 * stream_small

    def whole_peak(path):
        tracemalloc.start()
        try:
            corpus = read_corpus(path, "text", ReadOptions())
            [corpus.encode(s) for s in corpus.sentences]
            return tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    assert whole_peak(large) > 5 * whole_peak(small)


def test_a_streamed_corpus_counts_its_too_long_sentences_without_holding_them(tmp_path):
    # Reference: the file itself, its lines counted by length here.
    lines = [" ".join(["fen"] * (3 + k % 4)) for k in range(60)]          # 3-6 words
    lines += [" ".join(["marrow"] * (30 + k % 5)) for k in range(400)]    # 30-34 words
    path = tmp_path / "train.txt"
    path.write_text("\n".join(lines) + "\n")
    long_lines = sum(1 for line in lines if len(line.split()) > 10)
    streamed = StreamedCorpus(path, "text", ReadOptions(max_length=10), chunk_size=25)
    assert len(streamed) == len(lines) - long_lines == 60
    assert streamed.report.skipped_by_reason == {"too_long": long_lines}
    assert streamed.stream.set_aside == []
    assert [len(ids) for ids in streamed] == [3 + k % 4 for k in range(60)]
    # The in-memory reader still keeps them, for the reports that quote them.
    assert len(read_corpus(path, "text", ReadOptions(max_length=10)).set_aside) == long_lines
