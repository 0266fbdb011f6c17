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

import itertools
import math

import pytest
import torch

from _grammars import random_grammar
from test_consensus import SENTENCES, brute
from test_train_fixtures import base_overrides
from treewright.cli import main
from treewright.config import ConfigError
from treewright.decode import agreed_spans, consensus, decode
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


def _binary_trees(i: int, j: int) -> list[frozenset[tuple[int, int]]]:
    """Every binary tree over words [i, j), as its spans of width >= 2 (the whole included)."""
    if j - i == 1:
        return [frozenset()]
    return [left | right | {(i, j)} for k in range(i + 1, j)
            for left in _binary_trees(i, k) for right in _binary_trees(k, j)]


def test_agreed_spans_by_hand():
    # Three trees of four words: ((0 1) 2) 3, (0 1) (2 3), 0 ((1 2) 3).
    trees = [[(0, 2), (0, 3), (0, 4)], [(0, 2), (2, 4), (0, 4)], [(1, 3), (1, 4), (0, 4)]]
    assert agreed_spans(trees, 2 / 3) == [(0, 2), (0, 4)]
    assert agreed_spans(trees, 0.6) == [(0, 2), (0, 4)]
    assert agreed_spans(trees, 1.0) == [(0, 4)]
    assert agreed_spans(trees[:1], 1.0) == sorted(trees[0])
    for bad in (0.5, 0.2, 1.01):
        with pytest.raises(ValueError):
            agreed_spans(trees, bad)


def test_spans_most_trees_share_never_cross():
    # Reference: brute-force enumeration of every binary tree of five words (14) and every
    # triple of them; above one half of the trees, two kept spans share a tree, so they are
    # nested or apart (a fact the option's promise rests on). At one half they can cross.
    trees = _binary_trees(0, 5)
    assert len(trees) == 14                   # the Catalan number C4

    def crossing(spans):
        return any(a < c < b < d for a, b in spans for c, d in spans)

    for triple in itertools.product(trees, repeat=3):
        assert not crossing(agreed_spans([sorted(t) for t in triple], 0.6))
    assert any(crossing(sorted(a | b)) for a in trees for b in trees)


def test_brackets_from_with_agreement_keeps_what_the_restarts_share(staged_source, tmp_path):
    # Reference: each restart grammar's own mbr trees (the mbr decoder, checked against
    # brute-force enumeration in tests/test_decode.py). With two restarts any agreement above
    # one half asks for both, so the brackets are the spans their trees share.
    run, train_path = staged_source
    grammars = [s.grammar for s in open_restart_grammars(run)]
    sentences = [line.lower().split() for line in train_path.read_text().splitlines()]
    mbr = [decode(g, sentences, "mbr") for g in grammars]
    fewer = 0
    for agreement in ("0.6", "1"):
        cfg = _config(tmp_path, train_path, f"constraints.brackets_from={run}",
                      "data.lowercase=true", f"constraints.brackets_agreement={agreement}")
        data = load_data(cfg, grammar_brackets(cfg))
        for k, (words, got) in enumerate(zip(sentences, data.brackets)):
            n = len(words)
            shared = set.intersection(*[
                {(i, j) for i, j, _ in d[k].tree.labeled_spans() if j - i >= 2 and j - i < n}
                for d in mbr])
            assert got == sorted(shared)
            fewer += len(got) < max(n - 2, 0)
        assert any("of its 2 restarts' mbr trees" in n for n in data.notes)
    assert fewer >= 2   # the restarts disagree somewhere, so fewer than a whole tree's brackets


def test_brackets_agreement_needs_a_source_with_restarts(tmp_path):
    path = tmp_path / "g.pcfg"
    random_grammar(2, 2, 3, seed=21).save(path)
    train_path = _text(tmp_path, SENTENCES)
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, train_path, "constraints.brackets_agreement=0.75")
    assert "constraints.brackets_agreement" in str(err.value)
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, train_path, f"constraints.brackets_from={path}",
                "constraints.brackets_agreement=0.5")
    assert "constraints.brackets_agreement" in str(err.value)
    cfg = _config(tmp_path, train_path, f"constraints.brackets_from={path}",
                  "constraints.brackets_agreement=0.75")
    with pytest.raises(InputError) as err:
        grammar_brackets(cfg)
    assert "constraints.brackets_agreement" in str(err.value) and "g.pcfg" in str(err.value)


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


# ---- partial brackets beside the word-piece constraint ---------------------------------------

# Written words (by hand): `w1w0` over words 1-2 and `w2w0w1` over words 3-5, so positions 2,
# 4 and 5 are written joined to the word before.
PIECED = """\
1\tw2\t_\tX\t_\t_\t_\t_\t_\t_
2\tw1\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
3\tw0\t_\tX\t_\t_\t_\t_\t_\t_
4\tw2\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
5\tw0\t_\tX\t_\t_\t_\t_\t_\tSpaceAfter=No
6\tw1\t_\tX\t_\t_\t_\t_\t_\t_

"""
PIECED_WORDS = ["w2", "w1", "w0", "w2", "w0", "w1"]
PIECED_BARRED = [2, 4, 5]


def _bracketings(i: int, j: int) -> list[set]:
    """Every binary bracketing of words i..j-1, as its spans of width >= 2."""
    if j - i == 1:
        return [set()]
    return [{(i, j)} | left | right for k in range(i + 1, j)
            for left in _bracketings(i, k) for right in _bracketings(k, j)]


def _allowed(brackets, side, barred):
    """A tree's spans (i, j) of width >= 2 satisfy the brackets (none crosses one: Pereira &
    Schabes 1992) and the constraint (none starts at a barred position with the host first,
    ends just before one with the host last), by their definitions."""
    def keep(spans) -> bool:
        for i, j in spans:
            if (i if side == "first" else j) in barred:
                return False
            if any(i < a < j < b or a < i < b < j for a, b in brackets):
                return False
        return True
    return keep


@pytest.mark.parametrize("side", ["first", "last"])
def test_a_bracket_that_cuts_a_piece_is_left_out_while_the_constraint_applies(side):
    # Reference: brute force (test_train_fixtures.brute_force) over the trees the kept
    # brackets and the constraint allow. With every bracket kept no tree would be left (the
    # brute force says so too), and the sentence would drop out of training unseen.
    from test_train_fixtures import brute_force
    from treewright.engine import log_partition
    from treewright.params.tabular import tabular_from_grammar
    from treewright.word_pieces import cuts_piece
    g = random_grammar(2, 2, 3, seed=4)
    ids = [[int(w[1:]) for w in PIECED_WORDS]]
    # The brackets of one binary tree each (without the whole sentence).
    brackets = [[(0, 2), (2, 6), (3, 6), (4, 6)] if side == "first" else
                [(0, 2), (0, 4), (2, 4), (4, 6)]]
    cut = [b for b in brackets[0] if cuts_piece(side, set(PIECED_BARRED), *b)]
    assert 0 < len(cut) < len(brackets[0])
    with torch.no_grad():
        rules = tabular_from_grammar(g, g.vocab, dtype=torch.float64).rules()
    every = _allowed(brackets[0], side, PIECED_BARRED)
    assert not any(every(spans) for spans in _bracketings(0, len(PIECED_WORDS)))
    batch = make_batch([0], ids, brackets, torch.float64, (side, [PIECED_BARRED]))
    kept = [b for b in brackets[0] if b not in cut]
    want = brute_force(rules, ids[0], _allowed(kept, side, PIECED_BARRED))[0]
    terminal = rules.lexical[:, batch.ids[0]].T[None]
    got = log_partition(rules.root, rules.binary, terminal, batch.lengths,
                        span_pot=batch.span_pot)
    assert math.isfinite(want) and float(got[0]) == pytest.approx(want, abs=1e-10)
    # Without the constraint (an epoch after constraints.word_pieces_epochs) every bracket
    # applies again.
    free = make_batch([0], ids, brackets, torch.float64)
    got = log_partition(rules.root, rules.binary, terminal, free.lengths, span_pot=free.span_pot)
    assert float(got[0]) == pytest.approx(brute_force(rules, ids[0], _allowed(
        brackets[0], side, []))[0], abs=1e-10)


def test_gold_brackets_that_cut_a_piece_are_counted_in_the_log(tmp_path):
    # Gold trees (constraints.train_brackets) of the pieced sentence: the dependency tree below
    # makes [4, 6) a constituent (counted by hand: word 5 heads word 6), which starts at the
    # barred position 4 with the host first.
    heads = [0, 1, 2, 2, 4, 5]
    rows = [line.split("\t") for line in PIECED.strip().split("\n")]
    text = "".join("\t".join(r[:6] + [str(h), "dep" if h else "root"] + r[8:]) + "\n"
                   for r, h in zip(rows, heads)) + "\n"
    path = tmp_path / "gold.conllu"
    path.write_text(text * 3, encoding="utf-8")
    cfg = _config(tmp_path, path, "data.format=conllu", "constraints.train_brackets=true",
                  "constraints.word_pieces=host-first")
    data = load_data(cfg)
    from treewright.word_pieces import cuts_piece
    cut = sum(cuts_piece("first", {2, 4, 5}, i, j) for spans in data.brackets for i, j in spans)
    assert cut >= 3
    assert any(f"partial brackets: {cut} of {sum(map(len, data.brackets))} (in 3 sentences) "
               "cut a bound piece" in n for n in data.notes)


def test_brackets_from_a_run_that_held_the_constraint_are_decoded_under_it(tmp_path):
    # Reference: the mbr decoder under the constraint (checked against enumeration in
    # tests/test_decode.py), as `parse` decodes the source run's CoNLL-U: a source run folder
    # whose config and data_summary.json say it held the constraint, host first, to its end.
    import json

    import yaml
    from treewright.decode import decode
    source = tmp_path / "source"
    source.mkdir()
    g = random_grammar(3, 3, 3, seed=8)
    g.save(source / "grammar.pcfg")
    g = load_grammar(source / "grammar.pcfg")
    (source / "config.yaml").write_text(yaml.safe_dump({
        "data": {"format": "conllu"}, "constraints": {"word_pieces_epochs": None},
        "train": {"epochs": 5}}))
    (source / "data_summary.json").write_text(json.dumps({"word_pieces_host": "first"}))
    path = tmp_path / "train.conllu"
    path.write_text(PIECED * 2, encoding="utf-8")
    cfg = _config(tmp_path, path, "data.format=conllu", f"constraints.brackets_from={source}",
                  "constraints.word_pieces=host-first")
    data = load_data(cfg, grammar_brackets(cfg))
    (want,) = decode(g, [PIECED_WORDS], "mbr", pieces=("first", [PIECED_BARRED]))
    (free,) = decode(g, [PIECED_WORDS], "mbr")
    n = len(PIECED_WORDS)

    def brackets(tree):
        return sorted((i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2 and (i, j) != (0, n))
    assert brackets(want.tree) != brackets(free.tree)
    assert data.brackets == [brackets(want.tree)] * 2
    assert any("under the word-piece constraint it held, host first" in note
               for note in data.notes)
    assert not any("cut a bound piece" in note for note in data.notes)
