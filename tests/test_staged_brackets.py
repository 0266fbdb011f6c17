"""Staged induction: `constraints.brackets_from` takes the trees of an earlier grammar as partial
brackets (Pereira & Schabes 1992), and `constraints.brackets_epochs` says how long they last.

References: brute-force enumeration of every tree of a short sentence (tests/_brute.py, via
tests/test_consensus.py's `brute`) for a grammar's MBR tree; the consensus decoder, itself
checked against enumeration in tests/test_consensus.py; the meaning of a partial bracket (a tree
may not cross it: Pereira & Schabes 1992), through the masks `make_batch` builds, which
tests/test_train_em.py checks against enumeration; and a second training path (a bracketed
corpus with constraints.train_brackets) that must give the same grammar.
"""

from __future__ import annotations

import pytest
import torch

from _grammars import random_grammar
from test_consensus import SENTENCES, brute
from test_train_fixtures import base_overrides
from treewright.cli import main
from treewright.config import ConfigError
from treewright.decode import consensus, decode
from treewright.errors import InputError
from treewright.export import open_restart_grammars
from treewright.grammar import load_grammar
from treewright.induce import grammar_brackets, train
from treewright.train import load_train_config
from treewright.train.curriculum import Curriculum
from treewright.train.data import MemoryBudget, load_data
from treewright.train.estep import make_batch


def _text(folder, sentences, name="train.txt"):
    path = folder / name
    path.write_text("".join(" ".join(s) + "\n" for s in sentences), encoding="utf-8")
    return path


def _config(folder, train, *extra):
    return load_train_config(None, base_overrides(folder, train, None, **dict(
        e.split("=", 1) for e in extra)))


def test_brackets_from_a_grammar_file_are_its_mbr_trees(tmp_path):
    # Reference: brute force. The MBR tree of each sentence is the bracketing with the largest
    # summed span posterior over every bracketing, the posteriors from every enumerated tree;
    # its brackets are its spans of width >= 2 without the whole sentence (those constrain).
    path = tmp_path / "g.pcfg"
    random_grammar(2, 2, 3, seed=21).save(path)
    grammar = load_grammar(path)       # the rounded numbers the file holds
    train_path = _text(tmp_path, SENTENCES)
    cfg = _config(tmp_path, train_path, f"constraints.brackets_from={path}")
    data = load_data(cfg, grammar_brackets(cfg))
    for words, got in zip(SENTENCES, data.brackets):
        want = sorted(s for s in brute(grammar, words)["mbr"] if s != (0, len(words)))
        assert got == want
    assert any("partial brackets from" in n and "(mbr)" in n for n in data.notes)
    assert sum(map(len, data.brackets)) == sum(len(s) - 2 for s in SENTENCES if len(s) > 2)


@pytest.fixture(scope="module")
def staged_source(two_restart_run):
    """The tiny lowercased two-restart EM run of tests/conftest.py, and its training text."""
    return two_restart_run, two_restart_run.parent / "data" / "train.txt"


def test_brackets_from_a_run_with_restarts_are_the_consensus_of_its_restarts(staged_source,
                                                                              tmp_path):
    # Reference: the consensus decoder over the run's restart grammars, read as the run read
    # its words (lowercased); tests/test_consensus.py checks that decoder against brute-force
    # enumeration. Here: the brackets are its trees' spans, and every one constrains.
    run, train_path = staged_source
    cfg = _config(tmp_path, train_path, f"constraints.brackets_from={run}",
                  "data.lowercase=true")
    data = load_data(cfg, grammar_brackets(cfg))
    grammars = [s.grammar for s in open_restart_grammars(run)]
    sentences = [line.lower().split() for line in train_path.read_text().splitlines()]
    decoded = consensus(grammars, sentences)
    mbr = [decode(g, sentences, "mbr") for g in grammars]
    disagreed = 0
    for k, (words, got, d) in enumerate(zip(sentences, data.brackets, decoded)):
        n = len(words)
        assert got == sorted((i, j) for i, j, _ in d.tree.labeled_spans()
                             if j - i >= 2 and (i, j) != (0, n))
        assert len(got) == max(n - 2, 0)     # a whole binary tree: every bracket constrains
        disagreed += mbr[0][k].tree.to_string() != mbr[1][k].tree.to_string()
    assert disagreed >= 1                     # so the consensus is not one restart's trees
    assert any("consensus of its restarts" in n for n in data.notes)


def test_a_source_trained_on_other_data_options_is_refused_by_name(staged_source, tmp_path):
    # The source run lowercased its words; a run that does not would hand it other words.
    run, train_path = staged_source
    cfg = _config(tmp_path, train_path, f"constraints.brackets_from={run}")
    with pytest.raises(InputError) as err:
        grammar_brackets(cfg)
    assert "data.lowercase" in str(err.value) and "grammar.pcfg" in str(err.value)


def test_the_brackets_last_brackets_epochs_then_training_is_free(tmp_path):
    # Pereira & Schabes (1992): a bracket forbids the spans that cross it; the masks are those
    # of make_batch (checked against enumeration in tests/test_train_em.py).
    path = tmp_path / "g.pcfg"
    random_grammar(2, 2, 3, seed=21).save(path)
    train_path = _text(tmp_path, SENTENCES)
    cfg = _config(tmp_path, train_path, f"constraints.brackets_from={path}",
                  "constraints.brackets_epochs=2")
    data = load_data(cfg, grammar_brackets(cfg))
    curriculum = Curriculum(cfg, MemoryBudget(cfg, torch.float64), shuffle=False)
    ids = [3, 4]
    want = make_batch(ids, data.train_ids, data.brackets, torch.float64).span_pot
    assert want is not None and torch.isinf(want).any()
    for epoch in (0, 1):
        torch.testing.assert_close(curriculum.batch(data, ids, epoch, torch.float64).span_pot,
                                   want)
    assert curriculum.batch(data, ids, 2, torch.float64).span_pot is None
    # A run may not stop for convergence in the epoch before the release.
    assert [curriculum.same_data(e + 1, e) for e in range(4)] == [True, False, True, True]
    unset = _config(tmp_path, train_path, f"constraints.brackets_from={path}")
    assert all(Curriculum(unset, MemoryBudget(unset, torch.float64), False).brackets_on(e)
               for e in range(100))


@pytest.mark.parametrize("extra, option", [
    (["constraints.train_brackets=true"], "constraints.brackets_from"),
    (["data.stream_chunk=10", "train.method=online_em"], "constraints.brackets_from"),
])
def test_brackets_from_refuses_a_second_source_and_streaming(tmp_path, extra, option):
    path = tmp_path / "g.pcfg"
    random_grammar(2, 2, 3, seed=21).save(path)
    train_path = _text(tmp_path, SENTENCES)
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, train_path, f"constraints.brackets_from={path}", *extra)
    assert option in str(err.value)


def test_brackets_epochs_needs_brackets(tmp_path):
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, _text(tmp_path, SENTENCES), "constraints.brackets_epochs=3")
    assert "constraints.brackets_epochs" in str(err.value)


def test_a_staged_run_trains_as_a_run_on_the_source_trees_with_their_brackets(staged_source,
                                                                               tmp_path):
    # Reference: the same training on another path. The source's consensus trees, printed by
    # `treewright parse` and read back as a bracketed corpus with constraints.train_brackets
    # (whose masks tests/test_train_em.py checks against enumeration), must give the very same
    # grammar as the staged run that decodes them itself.
    run, train_path = staged_source
    common = ["data.lowercase=true", "train.epochs=3", "train.restarts=1"]
    staged = _config(tmp_path / "a", train_path, f"constraints.brackets_from={run}", *common)
    fitted = train(staged, tmp_path / "a" / "run")
    assert "partial brackets from" in (tmp_path / "a" / "run" / "train.log").read_text()
    trees = tmp_path / "source.trees"
    import io
    from contextlib import redirect_stdout
    out = io.StringIO()
    with redirect_stdout(out):
        assert main(["parse", str(run), str(train_path), "--decoder", "consensus"]) == 0
    trees.write_text(out.getvalue(), encoding="utf-8")
    gold = _config(tmp_path / "b", trees, "constraints.train_brackets=true", *common)
    other = train(gold, tmp_path / "b" / "run")
    assert fitted.grammar_path_.read_text() == other.grammar_path_.read_text()


def test_sentences_over_the_memory_budget_are_not_decoded_since_they_do_not_train(tmp_path):
    # Reference: the trainer's own plan (Curriculum.epoch_plan) leaves out the sentences longer
    # than the memory budget allows; exactly those get no brackets, and the note counts them.
    path = tmp_path / "g.pcfg"
    random_grammar(2, 2, 3, seed=21).save(path)
    train_path = _text(tmp_path, SENTENCES)
    free = _config(tmp_path, train_path)
    mb = MemoryBudget(free, torch.float64).sentence_bytes(4) / 2 ** 20
    cfg = _config(tmp_path, train_path, f"constraints.brackets_from={path}",
                  f"train.memory_budget_mb={mb}")
    data = load_data(cfg, grammar_brackets(cfg))
    planned = {i for batch in Curriculum(cfg, MemoryBudget(cfg, torch.float64), False)
               .epoch_plan(data.train_ids, 0, 0) for i in batch}
    assert planned == {i for i, s in enumerate(SENTENCES) if len(s) <= 4}
    for i, (words, got) in enumerate(zip(SENTENCES, data.brackets)):
        if i not in planned:
            assert got == []
        elif len(words) > 2:
            assert len(got) == len(words) - 2
    over = len(SENTENCES) - len(planned)
    assert any(f"{over} sentences over the memory budget's length (4 words)" in n
               for n in data.notes)
