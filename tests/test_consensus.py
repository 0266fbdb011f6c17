"""The consensus decoder (tree averaging over several grammars, Shayegh, Cao, Zhu, Cheung & Mou
2024, "Ensemble Distillation for Unsupervised Constituency Parsing") and `parse --decoder
consensus` on a run folder's restarts.

References: a fact of the algorithm (grammars that all give the same MBR tree vote for it
alone); brute-force enumeration of every tree of a short sentence (tests/_brute.py) for each
grammar's span and label marginals, its MBR tree and its tree probabilities; enumeration of
every binary bracketing for the summed-F1 objective; the parse command's one-line-per-input-line
contract (README, common practice for parser output).
"""

from __future__ import annotations

import json
import math
import shutil
from collections import defaultdict
from functools import lru_cache

import pytest
import torch

from _brute import all_trees
from _cli import cli
from _grammars import random_grammar
from test_train_fixtures import velmor
from treewright.budget import consensus_within_budget
from treewright.corpus import parse_brackets
from treewright.decode import consensus, decode
from treewright.errors import InputError
from treewright.export import open_restart_grammars, saved_restarts
from treewright.grammar import load_grammar
from treewright.inference import generate
from treewright.vocab import Vocabulary
from treewright.wordshapes import SCHEME


@lru_cache(maxsize=None)
def binary_trees(i: int, j: int) -> tuple[frozenset, ...]:
    """Every binary bracketing of words i..j as its spans of width >= 2 (brute force)."""
    if j - i == 1:
        return (frozenset(),)
    return tuple(left | right | {(i, j)} for k in range(i + 1, j)
                 for left in binary_trees(i, k) for right in binary_trees(k, j))


def brute(grammar, words):
    """From the list of every tree: log Z, labeled marginals {(i, j, symbol index): p}, the
    log-probability of each labeled tree (keyed by its set of labeled spans), and the MBR tree
    (the bracketing with the largest summed span posterior, over every bracketing)."""
    items = list(all_trees(grammar, words))
    if not items:
        return None
    logz = math.log(sum(math.exp(lp) for lp, _, _ in items))
    labeled = defaultdict(float)
    span_p = defaultdict(float)
    tree_lp = {}
    for lp, spans, _ in items:
        p = math.exp(lp - logz)
        for i, j, a in spans:
            labeled[(i, j, a)] += p
            if j - i >= 2:
                span_p[(i, j)] += p
        tree_lp[frozenset(spans)] = lp
    n = len(words)
    mbr = max(binary_trees(0, n), key=lambda t: sum(span_p[s] for s in t))
    return {"logz": logz, "labeled": labeled, "tree_lp": tree_lp, "mbr": mbr}


def spans_of(tree) -> frozenset:
    return frozenset((i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2)


def summed_f1(tree: frozenset, others, n: int) -> float:
    """Summed F1 of a binary tree against binary trees (all spans of width >= 2 counted)."""
    return sum(2 * len(tree & t) / (len(tree) + len(t)) for t in others)


def check_labels(decoded, grammar, reference, words):
    """Each span's label is the grammar's most probable nonterminal over it, each word's its most
    probable symbol (brute-force marginals), as the mbr decoder labels them."""
    nt = len(grammar.nonterminals)
    n = len(words)
    for i, j, label in decoded.tree.labeled_spans():
        choices = range(nt) if j - i >= 2 or n == 1 else range(grammar.num_symbols)
        best = max(choices, key=lambda a: reference["labeled"][(i, j, a)])
        assert label == grammar.symbols[best]


SENTENCES = [["w0", "w1"], ["w2", "w0", "w1"], ["w1", "w2", "w0", "w1"],
             ["w0", "w0", "w2", "w1", "w2"], ["w2", "w1", "w0", "w2", "w1", "w0"]]


def test_one_grammar_repeated_gives_its_mbr_trees():
    # Fact of the algorithm: when every vote is the same MBR tree, that tree alone has every
    # vote on each of its spans, so tree averaging returns it, labeled as mbr labels it.
    g = random_grammar(3, 2, 3, seed=11, nt_emit=True)  # so that one word parses too
    sentences = SENTENCES + [["w1"], ["w0", "w9"]]    # w9: unknown, no unknown-word token
    mbr = decode(g, sentences, "mbr", batch_size=3)
    for k in (2, 3):
        got = consensus([g] * k, sentences, batch_size=3)
        for a, b in zip(got, mbr):
            if b.tree is None:
                assert a.tree is None and a.log_likelihood == -math.inf
                continue
            assert a.tree.to_string() == b.tree.to_string()
            assert a.log_likelihood == b.log_likelihood
            assert a.tree_logprob == b.tree_logprob
            assert a.score == pytest.approx(1.0)      # F1 1 against every (identical) vote
    assert got[-1].tree is None


def test_three_grammars_maximize_summed_f1_against_their_mbr_trees():
    # Reference: brute force. Each grammar's MBR tree from its enumerated span posteriors;
    # the decoder's tree against the best summed F1 over every binary bracketing; labels,
    # log Z and log p(tree) of the first grammar from the enumerated trees.
    grammars = [random_grammar(2, 2, 3, seed=s) for s in (21, 22, 23)]
    decoded = consensus(grammars, SENTENCES, batch_size=4)
    disagreements = 0
    for words, d in zip(SENTENCES, decoded):
        n = len(words)
        refs = [brute(g, words) for g in grammars]
        votes = [r["mbr"] for r in refs]
        disagreements += len(set(votes)) > 1
        got = spans_of(d.tree)
        assert d.tree.leaves() == words and len(got) == max(n - 1, 0)
        if n >= 2:
            best = max(summed_f1(t, votes, n) for t in binary_trees(0, n))
            assert summed_f1(got, votes, n) == pytest.approx(best, abs=1e-12)
            assert d.score == pytest.approx(best / len(votes), abs=1e-12)
        check_labels(d, grammars[0], refs[0], words)
        assert d.log_likelihood == pytest.approx(refs[0]["logz"], abs=1e-10)
        assert d.tree_logprob == pytest.approx(
            refs[0]["tree_lp"][frozenset(
                (i, j, grammars[0].symbols.index(a)) for i, j, a in d.tree.labeled_spans())],
            abs=1e-10)
    assert disagreements >= 3  # the grammars do disagree, so the average is not one of them


def test_grammars_that_cannot_parse_do_not_vote_or_label():
    # The first grammar knows w0..w2 only; the others also w3; none knows w4 (no unknown-word
    # token). Reference: brute force, as above, over the grammars that parse each sentence.
    grammars = [random_grammar(2, 2, 3, seed=31), random_grammar(2, 2, 4, seed=32),
                random_grammar(2, 2, 4, seed=33)]
    sentences = [["w3", "w0", "w1", "w2"], ["w1", "w3", "w3", "w0", "w2"], ["w0", "w4"],
                 ["w0", "w1", "w2"]]
    decoded = consensus(grammars, sentences)
    for words, d in zip(sentences, decoded):
        refs = [brute(g, words) for g in grammars]
        parsing = [k for k, r in enumerate(refs) if r is not None]
        if not parsing:
            assert d.tree is None and d.score == -math.inf
            continue
        n = len(words)
        votes = [refs[k]["mbr"] for k in parsing]
        best = max(summed_f1(t, votes, n) for t in binary_trees(0, n))
        assert summed_f1(spans_of(d.tree), votes, n) == pytest.approx(best, abs=1e-12)
        first = parsing[0]
        assert first == (1 if "w3" in words else 0)
        check_labels(d, grammars[first], refs[first], words)
        assert d.log_likelihood == pytest.approx(refs[first]["logz"], abs=1e-10)
    assert decoded[2].tree is None


def test_consensus_needs_several_grammars_that_read_words_alike():
    g = random_grammar(2, 2, 3, seed=1)
    with pytest.raises(ValueError, match="two or more grammars"):
        consensus([g], SENTENCES)
    with pytest.raises(ValueError, match="several grammars"):
        decode(g, SENTENCES, "consensus")
    shaped = random_grammar(2, 2, 3, seed=2)
    shaped.vocab = Vocabulary(shaped.vocab.words, unk=None, shapes=SCHEME)
    with pytest.raises(ValueError, match="word shape"):
        consensus([g, shaped], SENTENCES)


def test_the_budget_leaves_out_what_no_grammar_can_fit():
    # Reference: the budget's own estimate per grammar (budget.sentence_bytes): a budget that
    # fits the short sentences under both grammars but not the longest under the larger one.
    from treewright.budget import MB, sentence_bytes
    small, large = random_grammar(2, 2, 3, seed=3), random_grammar(4, 3, 3, seed=4)
    budget = (sentence_bytes(large, 5, torch.float64) + 1) / MB
    assert sentence_bytes(large, 6, torch.float64) > budget * MB
    got = consensus_within_budget([small, large], SENTENCES, budget_mb=budget)
    assert [r is None for r in got] == [len(s) > 5 for s in SENTENCES]
    whole = consensus([small, large], SENTENCES)
    assert [r.tree.to_string() for r in got if r is not None] == \
        [r.tree.to_string() for r, s in zip(whole, SENTENCES) if len(s) <= 5]


# ---- the command line, on a run folder's restarts ---------------------------------------------


def test_parse_with_consensus_prints_one_tree_per_line(two_restart_run, tmp_path):
    run = two_restart_run
    text = tmp_path / "in.txt"
    lines = ["Ta ferro orun mo LANU", ""] + [" ".join(t.leaves())
                                             for t in generate(velmor(), 12, seed=7)]
    text.write_text("\n".join(lines) + "\n", encoding="utf-8")
    code, out, err = cli("parse", run, text, "--decoder", "consensus", "--objective")
    assert code == 0, err
    printed = out.split("\n")[:-1]
    assert len(printed) == len(lines)                 # one output line per input line
    assert printed[1] == ""                           # a blank line stays blank
    result = json.loads((run / "result.json").read_text())
    kept = result["best_restart"]
    restarts = [r["restart"] for r in result["restarts"]]
    assert sorted(restarts) == [0, 1]
    grammars = [load_grammar(run / f"restart-{r}.pcfg")
                for r in [kept] + [r for r in restarts if r != kept]]
    same_as_kept = disagreements = 0
    for line, row in zip(lines, printed):
        if not line:
            continue
        tree_text, objective = row.split("\t")
        tree = parse_brackets(tree_text)[0]
        words = line.split()
        assert tree.leaves() == words                 # the words as written
        lowered = [w.lower() for w in words]
        n = len(words)
        # Reference: each restart's mbr tree (the mbr decoder is checked against brute force
        # in tests/test_decode.py) and every binary bracketing of the sentence.
        votes = [spans_of(decode(g, [lowered], "mbr")[0].tree) for g in grammars]
        got = spans_of(tree)
        if n >= 2:
            best = max(summed_f1(t, votes, n) for t in binary_trees(0, n))
            assert summed_f1(got, votes, n) == pytest.approx(best, abs=1e-12)
            assert float(objective) == pytest.approx(best / len(votes), abs=1e-12)
            disagreements += len(set(votes)) > 1
        # Labeled under the kept restart: where the average is its own mbr tree, the printed
        # tree is exactly the kept restart's mbr tree.
        if got == votes[0]:
            mbr = decode(grammars[0], [lowered], "mbr")[0].tree.with_leaves(words)
            assert tree_text == mbr.to_string()
            same_as_kept += 1
    assert same_as_kept >= 1 and disagreements >= 1


def test_consensus_refuses_a_single_grammar(two_restart_run, tmp_path):
    text = tmp_path / "in.txt"
    text.write_text("kip sul\n", encoding="utf-8")
    single = two_restart_run / "grammar.pcfg"
    code, out, err = cli("parse", single, text, "--decoder", "consensus")
    assert code == 1 and out == ""
    assert str(single) in err and "run folder" in err and "restart" in err
    # A run folder that saved one restart only is refused too, naming the folder.
    lone = tmp_path / "lone"
    shutil.copytree(two_restart_run, lone)
    record = json.loads((lone / "result.json").read_text())
    record["restarts"] = [r for r in record["restarts"] if r["restart"] == record["best_restart"]]
    (lone / "result.json").write_text(json.dumps(record))
    with pytest.raises(InputError, match="saved 1") as caught:
        open_restart_grammars(lone, "the consensus decoder")
    assert caught.value.path == str(lone)
    # The other decoders still take the single grammar file.
    assert cli("parse", single, text, "--decoder", "mbr")[0] == 0


def test_report_scores_the_consensus_trees(two_restart_run, tmp_path):
    # Reference: sentence F1 counted by hand from its definition (spans of width >= 2, the
    # whole sentence left out, the mean over sentences with a span on either side; common
    # practice) between the library's consensus trees and gold trees drawn from Velmor.
    import re

    from treewright.report.html import build_report

    gold = generate(velmor(), 30, seed=7)
    gold_file = tmp_path / "gold.trees"
    gold_file.write_text("".join(t.to_string() + "\n" for t in gold), encoding="utf-8")
    page = build_report(two_restart_run, gold=gold_file, decoder="consensus")
    assert "trees decoded with consensus (as asked), over the run&#x27;s 2 restarts" in page
    grammars = [s.grammar for s in open_restart_grammars(two_restart_run)]
    decoded = consensus(grammars, [t.leaves() for t in gold])
    scores = []
    for t, d in zip(gold, decoded):
        n = len(t.leaves())
        want = {(i, j) for i, j, _ in t.labeled_spans() if j - i >= 2 and (i, j) != (0, n)}
        got = {(i, j) for i, j, _ in d.tree.labeled_spans() if j - i >= 2 and (i, j) != (0, n)}
        if want or got:
            scores.append(2 * len(want & got) / (len(want) + len(got)))
    row = re.search(r"<tr><td>model</td><td class='num'>([0-9.]+)</td>", page)
    assert row is not None
    assert float(row.group(1)) == pytest.approx(100 * sum(scores) / len(scores), abs=0.05)
    # A grammar file given as the grammar to decode with is refused, naming it.
    with pytest.raises(InputError, match="run folder") as caught:
        build_report(two_restart_run, gold=gold_file, decoder="consensus",
                     grammar_path=two_restart_run / "grammar.pcfg")
    assert caught.value.path == str(two_restart_run / "grammar.pcfg")


def test_a_run_with_several_restarts_is_read_by_consensus_unless_asked(two_restart_run,
                                                                        tmp_path):
    # The default decoder follows what was saved: the run folder (two restarts) by consensus,
    # its grammar file (one grammar) by viterbi, a run that lists one restart by viterbi. The
    # references are the same commands with the decoder named.
    from treewright.report.html import build_report

    text = tmp_path / "in.txt"
    text.write_text("".join(" ".join(t.leaves()) + "\n" for t in generate(velmor(), 8, seed=3)),
                    encoding="utf-8")
    assert saved_restarts(two_restart_run) == 2
    assert saved_restarts(two_restart_run / "grammar.pcfg") == 0
    default = cli("parse", two_restart_run, text)
    assert default[0] == 0 and default[1] == cli("parse", two_restart_run, text, "--decoder",
                                                 "consensus")[1]
    single = two_restart_run / "grammar.pcfg"
    assert cli("parse", single, text)[1] == cli("parse", single, text, "--decoder",
                                                "viterbi")[1]
    lone = tmp_path / "lone"
    shutil.copytree(two_restart_run, lone)
    record = json.loads((lone / "result.json").read_text())
    record["restarts"] = [r for r in record["restarts"] if r["restart"] == record["best_restart"]]
    (lone / "result.json").write_text(json.dumps(record))
    assert saved_restarts(lone) == 1
    assert cli("parse", lone, text)[1] == cli("parse", lone, text, "--decoder", "viterbi")[1]
    gold = tmp_path / "gold.trees"
    gold.write_text("".join(t.to_string() + "\n" for t in generate(velmor(), 8, seed=3)),
                    encoding="utf-8")
    page = build_report(two_restart_run, gold=gold)
    assert "trees decoded with consensus over the run&#x27;s 2 restarts" in page
    assert "trees decoded with mbr" in build_report(lone, gold=gold)
