"""`treewright evaluate` on files: hand-worked F1, CoNLL-U gold, mismatches, held-out likelihood."""

from __future__ import annotations

import argparse
import importlib.util
import json
import math
from pathlib import Path

import pytest

from treewright.cli import evaluate as evaluate_cmd
from treewright.cli import parse as parse_cmd
from treewright.errors import InputError
from treewright.trees import Tree

ROOT = Path(__file__).resolve().parent.parent
TEXTBOOK = ROOT / "src" / "treewright" / "data" / "examples" / "astronomers.pcfg"


def run(module, argv) -> int:
    parser = argparse.ArgumentParser()
    module.add_arguments(parser)
    return module.run(parser.parse_args([str(a) for a in argv]))


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def test_hand_worked_f1_and_json(tmp_path, capsys):
    # Hand-worked: gold spans (whole span excluded, common practice) are {(0,2),(2,4)} and
    # {(1,3)}; predicted {(0,2),(0,3)} and {(1,3)}: sentence F1 0.5 and 1.0, mean 0.75; corpus
    # matched 2 of 3 predicted, 2 of 3 gold, F1 2/3.
    gold = write(tmp_path / "gold.trees",
                 "(S (A (x a) (x b)) (B (x c) (x d)))\n(S (x e) (C (x f) (x g)))\n")
    pred = write(tmp_path / "pred.trees",
                 "(N0 (N1 (N2 (P a) (P b)) (P c)) (P d))\n(N0 (P e) (N1 (P f) (P g)))\n")
    out = tmp_path / "scores.json"
    assert run(evaluate_cmd, [pred, gold, "--json", out]) == 0
    table = capsys.readouterr().out
    for baseline in ("left-branching", "right-branching", "random binary", "binary upper bound"):
        assert baseline in table
    scores = json.loads(out.read_text())
    model = scores["brackets"]["systems"]["model"]
    assert model["sentence_f1"] == pytest.approx(0.75)
    assert model["corpus_f1"] == pytest.approx(2 / 3)
    # Hand-worked: left-branching gives {(0,2),(0,3)} and {(0,2)}: matched 1 + 0.
    assert scores["brackets"]["systems"]["left_branching"]["corpus_precision"] == \
        pytest.approx(1 / 3)
    # Tags: induced P for every word against gold x: one label meets one tag, so many-to-one
    # is 1 and V-measure is 1 by its degenerate-case definition (Rosenberg & Hirschberg 2007).
    assert scores["tags"]["many_to_one"] == 1.0 and scores["tags"]["v_measure"] == 1.0
    assert scores["likelihood"] is None and "--grammar" in scores["likelihood_note"]


def test_conllu_gold_scored_against_its_own_trees(tmp_path):
    # Open data: the first sentences of the Turkish Web Treebank (turkish-treebanks package).
    spec = importlib.util.find_spec("data")
    candidates = [Path(p) / "web.conllu" for p in (spec.submodule_search_locations or [])] \
        if spec else []
    source = next((p for p in candidates if p.exists()), None)
    if source is None:
        pytest.skip("turkish-treebanks data not installed")
    blocks = source.read_text(encoding="utf-8").split("\n\n")[:30]
    gold = write(tmp_path / "gold.conllu", "\n\n".join(blocks) + "\n\n")
    from treewright.corpus import ReadOptions, read_corpus
    trees = [s.tree for s in read_corpus(gold, "conllu", ReadOptions(nonprojective="lift")).sentences]
    assert len(trees) == 30
    pred = write(tmp_path / "pred.trees", "".join(t.to_string() + "\n" for t in trees))
    out = tmp_path / "s.json"
    assert run(evaluate_cmd, [pred, gold, "--json", out]) == 0
    scores = json.loads(out.read_text())
    # Fact of the trade: a tree scored against itself has P = R = F1 = 1 and its preterminals
    # (the UPOS tags) are a perfect tagging.
    assert scores["brackets"]["systems"]["model"]["corpus_f1"] == 1.0
    assert scores["tags"]["many_to_one"] == 1.0 and scores["tags"]["v_measure"] == 1.0
    assert scores["counts"]["sentences"] == 30


def test_mismatch_names_the_line(tmp_path):
    gold = write(tmp_path / "gold.trees", "(S (x a) (x b))\n\n(S (x c) (x d))\n")
    pred = write(tmp_path / "pred.trees", "(S (x a) (x b))\n(S (x c) (x e))\n")
    with pytest.raises(InputError) as err:
        run(evaluate_cmd, [pred, gold])
    assert err.value.line == 2 and err.value.path == str(pred)
    assert "'e'" in str(err.value) and "line 3" in str(err.value)  # the gold line too
    short = write(tmp_path / "short.trees", "(S (x a) (x b))\n")
    with pytest.raises(InputError) as err:
        run(evaluate_cmd, [short, gold])
    assert err.value.path == str(gold) and err.value.line == 3


def test_parse_then_evaluate_with_heldout_likelihood(tmp_path, capsys):
    # Published worked example (Manning & Schuetze 1999, ch. 11; values from memory):
    # p("astronomers saw stars with ears") = 0.0015876, the Viterbi tree has 0.0009072.
    text = write(tmp_path / "s.txt", "astronomers saw stars with ears\n")
    assert run(parse_cmd, [TEXTBOOK, text, "--decoder", "mbr", "--scores"]) == 0
    line = capsys.readouterr().out.strip()
    tree_text, logp, posterior = line.split("\t")
    assert float(posterior) == pytest.approx(0.0009072 / 0.0015876, rel=1e-9)
    assert math.exp(float(logp)) == pytest.approx(0.0009072, rel=1e-9)
    pred = write(tmp_path / "pred.trees", tree_text + "\n")
    out = tmp_path / "s.json"
    assert run(evaluate_cmd, [pred, pred, "--grammar", TEXTBOOK, "--text", text,
                              "--json", out]) == 0
    scores = json.loads(out.read_text())["likelihood"]
    assert scores["perplexity"] == pytest.approx(0.0015876 ** (-1 / 5), rel=1e-5)
    with pytest.raises(InputError, match="go together"):
        run(evaluate_cmd, [pred, pred, "--grammar", TEXTBOOK])


def test_a_run_trained_on_lowercased_words_parses_capitalised_input(tmp_path, capsys):
    # Published worked example (Manning & Schuetze 1999, ch. 11; values from memory), as above,
    # but written with capitals and given through a run folder whose config.yaml says the
    # training corpus was lowercased: the words are lowercased for the grammar, the printed tree
    # keeps them as written, and the published probabilities come out.
    from treewright.cli import score as score_cmd
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    (run_dir / "grammar.pcfg").write_bytes(TEXTBOOK.read_bytes())
    (run_dir / "config.yaml").write_text("data:\n  lowercase: true\n", encoding="utf-8")
    text = write(tmp_path / "s.txt", "Astronomers saw STARS with ears\n")
    assert run(parse_cmd, [run_dir, text, "--decoder", "mbr", "--scores"]) == 0
    captured = capsys.readouterr()
    assert "lowercasing the input words" in captured.err
    tree_text, logp, posterior = captured.out.strip().split("\t")
    assert "Astronomers" in tree_text and "STARS" in tree_text and "stars" not in tree_text
    assert math.exp(float(logp)) == pytest.approx(0.0009072, rel=1e-9)
    assert float(posterior) == pytest.approx(0.0009072 / 0.0015876, rel=1e-9)
    assert run(score_cmd, [run_dir, text, "--float64"]) == 0
    first = json.loads(capsys.readouterr().out.splitlines()[0])
    assert math.exp(first["logprob"]) == pytest.approx(0.0015876, rel=1e-9)
    # The bare grammar file records no training settings: the capitals stay, and do not parse.
    assert run(parse_cmd, [TEXTBOOK, text]) == 0
    captured = capsys.readouterr()
    assert captured.out.startswith("(NOPARSE Astronomers") and "unknown words" in captured.err


def test_unparsed_predictions_are_counted(tmp_path):
    gold = write(tmp_path / "gold.trees", "(S (A (x a) (x b)) (x c))\n")
    pred = write(tmp_path / "pred.trees", Tree("NOPARSE", ["a", "b", "c"]).to_string() + "\n")
    out = tmp_path / "s.json"
    assert run(evaluate_cmd, [pred, gold, "--json", out]) == 0
    scores = json.loads(out.read_text())
    assert scores["counts"]["unparsed_predictions"] == 1
    # Hand-worked: the flat tree predicts no span, gold has (0,2): recall 0.
    assert scores["brackets"]["systems"]["model"]["corpus_recall"] == 0.0
    assert scores["tags"] is None


def test_parse_command_offers_exactly_the_library_decoders():
    from treewright.cli.parse import DECODER_NAMES
    from treewright.decode import DECODERS, ENSEMBLE_DECODERS, MODEL_DECODERS
    assert tuple(DECODER_NAMES) == tuple(DECODERS) + tuple(ENSEMBLE_DECODERS) + \
        tuple(MODEL_DECODERS)


# Invented sentence (Velmor words) in CoNLL-U: "dulo" is the contraction of de + ulo (a
# multiword token whose words do not spell it) and "velo" is written for ve + lo; by the
# CoNLL-U rule, gold brackets are over the syntactic words de ulo ve lo sen.
SPLIT_GOLD = """\
# sent_id = mill-1
1-2\tdulo\t_\t_\t_\t_\t_\t_\t_\t_
1\tde\t_\tADP\t_\t_\t2\tcase\t_\t_
2\tulo\t_\tNOUN\t_\t_\t5\tobl\t_\t_
3-4\tvelo\t_\t_\t_\t_\t_\t_\t_\t_
3\tve\t_\tADP\t_\t_\t4\tcase\t_\t_
4\tlo\t_\tNOUN\t_\t_\t5\tobl\t_\t_
5\tsen\t_\tVERB\t_\t_\t0\troot\t_\t_

"""


@pytest.mark.parametrize("pred_text, form, pieces", [
    ("(S (X dulo) (S (X velo) (X sen)))", "dulo", "de + ulo"),
    ("(S (X de) (S (X ulo) (S (X velo) (X sen))))", "velo", "ve + lo")])
def test_a_word_as_written_against_the_gold_words_says_so(tmp_path, pred_text, form, pieces):
    # A prediction over the text as written cannot be scored against syntactic words: the
    # error names the written word and the gold's words for it (read off SPLIT_GOLD by hand).
    gold = write(tmp_path / "gold.conllu", SPLIT_GOLD)
    pred = write(tmp_path / "pred.trees", pred_text + "\n")
    with pytest.raises(InputError) as err:
        run(evaluate_cmd, [pred, gold])
    assert f"the gold writes {form!r} as the 2 words {pieces} and is scored on those" \
        in str(err.value)
    assert err.value.line == 1
