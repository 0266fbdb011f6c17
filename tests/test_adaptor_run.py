"""`treewright segment`: a word-segmentation run from a config into a run folder (issue 23)."""

from __future__ import annotations

import json
import sys
import time
from collections import Counter
from pathlib import Path

import pytest

from treewright.adaptor import AdaptorSampler, read_utterances
from treewright.adaptor.config import load_segment_config
from treewright.adaptor.grammars import unigram_word_grammar
from treewright.adaptor.run import segment_resume, segment_words
from treewright.adaptor.sampler import Chain
from treewright.cli import main
from treewright.config import ConfigError
from treewright.errors import InputError
from treewright.evaluation import evaluate_segmentation

REPO = Path(__file__).resolve().parents[1]
SHIPPED = REPO / "src/treewright/data/examples/ostreli.txt"


def _config(tmp_path: Path, lines: int = 40, **sampler) -> Path:
    text = tmp_path / "ostreli.txt"
    text.write_text("".join(SHIPPED.read_text(encoding="utf-8").splitlines(keepends=True)
                            [:lines]), encoding="utf-8")
    settings = {"sweeps": 6, "checkpoint_every": 2, "seed": 3, **sampler}
    config = tmp_path / "segment.yaml"
    config.write_text(json.dumps({"data": {"text": str(text)}, "sampler": settings}))
    return config


def _metric_lines(run: Path) -> list[dict]:
    # "time" is the wall clock of each line, the one field a resumed run cannot repeat.
    return [{k: v for k, v in json.loads(line).items() if k != "time"}
            for line in (run / "metrics.jsonl").read_text().splitlines()]


def _stopped_in_sweep(k: int, config: Path, run: Path, monkeypatch) -> None:
    """Run `config` into `run` and interrupt it as its k-th chain sweep starts (that sweep's
    work is lost, as when the process is killed)."""
    calls = {"n": 0}
    sweep = Chain.sweep

    def stopping(chain, temperature):
        calls["n"] += 1
        if calls["n"] == k:
            raise KeyboardInterrupt
        sweep(chain, temperature)

    monkeypatch.setattr(Chain, "sweep", stopping)
    with pytest.raises(KeyboardInterrupt):
        segment_words(load_segment_config(config), run)
    monkeypatch.setattr(Chain, "sweep", sweep)


def test_resume_continues_bit_for_bit(tmp_path, monkeypatch):
    # Reference: the uninterrupted run of the same config. A run stopped in sweep 5 (after
    # the checkpoint of sweep 4, with sweep 5's work lost) and resumed must end with the same
    # chains (restaurants, trees, generator state), outputs and metric lines.
    config = _config(tmp_path, anneal_from=3.0, anneal_sweeps=4, resample_hyperparameters=True)
    straight = segment_words(load_segment_config(config), tmp_path / "straight")
    _stopped_in_sweep(5, config, tmp_path / "halves", monkeypatch)
    state = json.loads((tmp_path / "halves/chains.json").read_text())
    assert state["chains"]["chains"][0]["sweeps"] == 4
    resumed = segment_resume(tmp_path / "halves")
    assert resumed.sweeps == straight.sweeps == 6
    for name in ("segmentation.txt", "lexicon.tsv"):
        assert (tmp_path / "halves" / name).read_text() == (tmp_path / "straight" / name
                                                             ).read_text(), name
    # The checkpoints hold the same chains; only the byte size of metrics.jsonl may differ,
    # since its lines carry the wall-clock time.
    ends = [json.loads((tmp_path / run / "chains.json").read_text())
            for run in ("halves", "straight")]
    assert ends[0]["chains"] == ends[1]["chains"]
    # ... and the same boundary counts: recorded after sweeps 2, 4 (before the stop) and 6.
    assert ends[0]["boundaries"] == ends[1]["boundaries"]
    assert ends[0]["boundaries"]["samples"] == 3
    assert _metric_lines(tmp_path / "halves") == _metric_lines(tmp_path / "straight")
    assert [m["step"] for m in _metric_lines(tmp_path / "straight")] == list(range(7))
    # The annealing schedule (annealing's own test checks it by hand) runs on across the stop,
    # and the resampled concentration moved from the grammar's 10.
    lines = _metric_lines(tmp_path / "halves")
    assert [m.get("temperature") for m in lines] == [None, 3.0, 2.5, 2.0, 1.5, 1.0, 1.0]
    assert lines[0]["concentration"] == 10.0 and lines[-1]["concentration"] != 10.0


def test_outputs_agree_with_the_chains_and_the_gold(tmp_path):
    # samples 0: the segmentation is the chain's own last state, whose words its lexicon counts.
    config = _config(tmp_path, sweeps=4, score_every=2, samples=0)
    result = segment_words(load_segment_config(config), tmp_path / "run")
    run = tmp_path / "run"
    corpus = read_utterances(tmp_path / "ostreli.txt")
    words = [line.split() for line in (run / "segmentation.txt").read_text().splitlines()]
    # The segmentation joins back to each utterance's characters, one line per utterance.
    assert ["".join(w) for w in words] == ["".join(c) for c in corpus.characters]
    # In the unigram word grammar every word of the segmentation is one customer of Word
    # (Word has no Word inside it), so the lexicon's customers count the words (a fact of the
    # Chinese-restaurant representation).
    lexicon = [line.split("\t") for line in (run / "lexicon.tsv").read_text().splitlines()]
    assert sum(int(customers) for _, customers, _ in lexicon) == sum(map(len, words))
    assert {text for text, _, _ in lexicon} == {w for ws in words for w in ws}
    # The last metric line scores the written segmentation against the gold spaces
    # (evaluate_segmentation, checked against scikit-learn in test_adaptor_segment.py), and
    # its log_joint is the one the checkpointed chains give.
    last = _metric_lines(run)[-1]
    scores = evaluate_segmentation(words, corpus.gold)
    assert (last["step"], last["token_f1"], last["boundary_f1"]) == \
        (4, scores.tokens.f1, scores.boundaries.f1)
    assert result.scores == scores
    chains = AdaptorSampler.from_state(json.loads((run / "chains.json").read_text())["chains"])
    assert last["log_joint"] == chains.chains[0].log_joint()
    assert [m["step"] for m in _metric_lines(run)] == [0, 2, 4]
    # The log posterior curve in TensorBoard (read back by TensorBoard's own event reader)
    # is metrics.jsonl's log_joint at every scored sweep, stored as float32.
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
    events = EventAccumulator(str(run / "tensorboard"))
    events.Reload()
    curve = [(e.step, e.value) for e in events.Scalars("log_joint")]
    assert curve == [(m["step"], pytest.approx(m["log_joint"], rel=1e-6))
                     for m in _metric_lines(run)]
    assert "token_f1" in events.Tags()["scalars"]


def test_the_command_runs_resumes_and_refuses(tmp_path, capsys):
    config = _config(tmp_path, sweeps=2)
    run = tmp_path / "run"
    assert main(["segment", str(config), f"output.run_dir={run}"]) == 0
    assert capsys.readouterr().out.strip().endswith(str(run / "segmentation.txt"))
    # The folder now holds a checkpoint: a fresh run refuses it, and --resume takes no config.
    assert main(["segment", str(config), f"output.run_dir={run}"]) == 1
    assert "already holds a checkpoint; continue it with --resume" in capsys.readouterr().err
    assert main(["segment", str(config), "--resume", str(run)]) == 1
    assert "give no config file" in capsys.readouterr().err
    assert main(["segment", "--resume", str(run)]) == 0  # nothing left: ends at once
    assert main(["validate", str(config)]) == 0
    assert "valid segment config (2 sweeps, 1 chain)" in capsys.readouterr().out


def test_bad_configs_and_changed_text_are_refused(tmp_path):
    config = _config(tmp_path)
    # The Pitman-Yor process needs b > -a (Pitman & Yor 1997).
    with pytest.raises(ConfigError, match="grammar.concentration: must exceed"):
        load_segment_config(config, ["grammar.discount=0.5", "grammar.concentration=-0.5"])
    # The Beta and Gamma priors of the resampled values are 0 at a discount of 0.
    with pytest.raises(ConfigError, match="sampler.resample_hyperparameters: the priors"):
        load_segment_config(config, ["grammar.discount=0", "sampler.resample_hyperparameters=true"])
    with pytest.raises(ConfigError, match="sampler.sweeps"):
        load_segment_config(config, ["sampler.sweeps=-1"])
    cfg = load_segment_config(config, ["sampler.sweeps=2"])
    segment_words(cfg, tmp_path / "run")
    (tmp_path / "ostreli.txt").write_text("kalu\n")
    with pytest.raises(InputError, match="differ from those the checkpoint"):
        segment_resume(tmp_path / "run")


def test_the_shipped_text_is_the_generator_output():
    # Reference: the seeded generator in scripts/segment_invented_language.py, which wrote it.
    sys.path.insert(0, str(REPO / "scripts"))
    try:
        from segment_invented_language import ostreli
    finally:
        sys.path.remove(str(REPO / "scripts"))
    assert SHIPPED.read_text(encoding="utf-8").splitlines() == ostreli(400)


def test_several_chains_report_the_one_with_the_highest_log_joint(tmp_path):
    # Reference: each chain's log joint recomputed from the saved chains (a fresh seating of
    # its trees, `Chain.log_joint`) and the segmentation read off that chain's own trees; the
    # outputs and the last metric line must be those of the best, whichever number it has.
    config = _config(tmp_path, chains=3, sweeps=4, samples=0)
    result = segment_words(load_segment_config(config), tmp_path / "run")
    state = json.loads((tmp_path / "run/chains.json").read_text())
    sampler = AdaptorSampler.from_state(state["chains"])
    joints = [chain.log_joint() for chain in sampler.chains]
    best = max(range(3), key=lambda c: joints[c])
    assert len(set(joints)) == 3 and best != 0   # this seed makes the check bite
    expected = "".join(" ".join(w) + "\n" for w in sampler.segmentations("Word", best))
    assert result.segmentation.read_text(encoding="utf-8") == expected
    assert expected != "".join(" ".join(w) + "\n" for w in sampler.segmentations("Word", 0))
    lexicon = (tmp_path / "run/lexicon.tsv").read_text(encoding="utf-8").splitlines()
    assert lexicon == [f"{t}\t{c}\t{k}" for t, c, k in sampler.lexicon("Word", best)]
    last = _metric_lines(tmp_path / "run")[-1]
    assert last["chain"] == best
    assert last["log_joint"] == pytest.approx(joints[best], rel=1e-12)
    assert [last[f"log_joint_chain{c}"] for c in range(3)] == pytest.approx(joints, rel=1e-12)
    gold = read_utterances(tmp_path / "ostreli.txt").gold
    assert last["token_f1"] == pytest.approx(evaluate_segmentation(
        sampler.segmentations("Word", best), gold).tokens.f1)


def _cut_positions(words):
    """The positions between characters where `words` meet (counted here, apart from
    treewright's own cutting)."""
    ends, k = set(), 0
    for w in words[:-1]:
        k += len(w)
        ends.add(k)
    return ends


@pytest.mark.parametrize("rule", ["majority", "expected-f1"])
def test_the_segmentation_pools_every_chains_recorded_analyses(tmp_path, rule):
    # Reference: the same chains run by hand through the Python API (same grammar, seed and
    # utterances), each chain's segmentation read after sweeps 2, 4 and 6, and every position
    # cut by more than half of those 9 analyses (a majority counted here with a Counter), or
    # by at least the count, of 1 to 9, whose cuts score the highest expected boundary F1,
    # 2 * (their summed shares) / (their number + every share's sum) (Jansche 2005).
    config = _config(tmp_path, chains=3, sweeps=6, samples=3, sample_every=2, cut_rule=rule)
    result = segment_words(load_segment_config(config), tmp_path / "run")
    corpus = read_utterances(tmp_path / "ostreli.txt")
    chars = [c for u in corpus.characters for c in u]
    sampler = AdaptorSampler(unigram_word_grammar(chars), corpus.characters, chains=3, seed=3)
    votes = [Counter() for _ in corpus.characters]
    own = []
    for _ in range(3):
        sampler.run(2)
        for c in range(3):
            own.append(sampler.segmentations("Word", c))
            for tally, words in zip(votes, own[-1]):
                tally.update(_cut_positions(words))
    least = 5
    if rule == "expected-f1":
        counts = [n for tally in votes for n in tally.values()]

        def expected_f1(t):
            kept = [n / 9 for n in counts if n >= t]
            return 2 * sum(kept) / (len(kept) + sum(counts) / 9)

        least = max(range(1, 10), key=lambda t: (expected_f1(t), t))
        assert least < 5   # here the two rules differ
    expected = []
    for tally, u in zip(votes, corpus.characters):
        cuts = sorted(k for k, n in tally.items() if n >= least)
        edges = [0, *cuts, len(u)]
        expected.append(" ".join("".join(u[i:j]) for i, j in zip(edges, edges[1:])))
    written = result.segmentation.read_text(encoding="utf-8").splitlines()
    assert written == expected
    # It differs from every chain's last state (so the pooling is what was written), and it
    # is scored against the gold.
    assert all(written != [" ".join(w) for w in own[-1 - c]] for c in range(3))
    assert result.scores == evaluate_segmentation([line.split() for line in written],
                                                  corpus.gold)
    state = json.loads((tmp_path / "run/chains.json").read_text())
    assert state["boundaries"]["samples"] == 9
    assert state["chains"] == sampler.state()


def test_a_checkpoint_without_boundary_counts_resumes_only_before_the_first_record(
        tmp_path, monkeypatch):
    # A checkpoint of the first version (no boundary counts), made here by taking them out.
    config = _config(tmp_path, sweeps=6, samples=2, sample_every=1, checkpoint_every=2)
    straight = segment_words(load_segment_config(config), tmp_path / "straight")
    _stopped_in_sweep(5, config, tmp_path / "halves", monkeypatch)
    path = tmp_path / "halves/chains.json"
    state = json.loads(path.read_text())
    assert state["boundaries"]["samples"] == 0   # sweeps 5 and 6 record; it stopped at 4
    del state["boundaries"]
    state["version"] = 1
    path.write_text(json.dumps(state))
    segment_resume(tmp_path / "halves")
    assert (tmp_path / "halves/segmentation.txt").read_text() == \
        straight.segmentation.read_text()
    # Stopped after a recorded sweep, the counts it lacks cannot be made again: refused.
    config = _config(tmp_path, sweeps=6, samples=4, sample_every=1, checkpoint_every=2)
    _stopped_in_sweep(5, config, tmp_path / "late", monkeypatch)
    path = tmp_path / "late/chains.json"
    state = json.loads(path.read_text())
    assert state["boundaries"]["samples"] == 2   # after sweeps 3 and 4 (of 3, 4, 5, 6)
    del state["boundaries"]
    state["version"] = 1
    path.write_text(json.dumps(state))
    with pytest.raises(InputError, match="kept no boundary counts"):
        segment_resume(tmp_path / "late")
    # A damaged count is refused with the file named.
    state = json.loads((tmp_path / "straight/chains.json").read_text())
    state["boundaries"]["counts"][0][0] = 99
    path.write_text(json.dumps(state))
    with pytest.raises(InputError, match="late/chains.json.*utterance 1"):
        segment_resume(tmp_path / "late")


def test_a_resumed_run_replaces_the_tensorboard_events_logged_after_its_checkpoint(
        tmp_path, monkeypatch):
    # A run checkpointed at sweep 3 that logged sweep 4 and stopped in sweep 5 logs sweep 4
    # again when resumed. Reference: TensorBoard's own event reader, which drops the earlier
    # session's events from the resumed session's first step on (its purge of orphaned data),
    # must show each sweep once, with metrics.jsonl's values.
    config = _config(tmp_path, checkpoint_every=3)
    _stopped_in_sweep(5, config, tmp_path / "run", monkeypatch)
    assert [m["step"] for m in _metric_lines(tmp_path / "run")] == [0, 1, 2, 3, 4]
    # TensorBoard reads a folder's event files in name order, and a name holds the second it
    # was made and a counter of this process (so ".10" sorts before ".9"): a resumed run, in a
    # later process, starts its file in a later second, as it does here.
    time.sleep(1.1)
    segment_resume(tmp_path / "run")
    lines = _metric_lines(tmp_path / "run")
    assert [m["step"] for m in lines] == list(range(7))
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator
    events = EventAccumulator(str(tmp_path / "run" / "tensorboard"))
    events.Reload()
    curve = [(e.step, e.value) for e in events.Scalars("log_joint")]
    assert curve == [(m["step"], pytest.approx(m["log_joint"], rel=1e-6)) for m in lines]
