"""Every GRAMMAR argument takes a grammar text file, a JSON export and a run folder: here
`evaluate --grammar` and `report --grammar`, checked on the textbook grammar."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import pytest

from treewright.cli import main

ROOT = Path(__file__).resolve().parent.parent
TEXTBOOK = ROOT / "src" / "treewright" / "data" / "examples" / "astronomers.pcfg"
SENTENCE = "astronomers saw stars with ears"
TREE = "(S (NP astronomers) (VP (V saw) (NP (NP stars) (PP (P with) (NP ears)))))"


@pytest.fixture(scope="module")
def grammars(tmp_path_factory):
    """The textbook grammar in each of the three forms a GRAMMAR argument accepts."""
    folder = tmp_path_factory.mktemp("grammars")
    run = folder / "run"
    run.mkdir()
    shutil.copy(TEXTBOOK, run / "grammar.pcfg")  # a run folder holds its result grammar.pcfg
    export = folder / "astronomers.json"
    assert main(["export", str(TEXTBOOK), "--to", "json", "--out", str(export)]) == 0
    return {"text": TEXTBOOK, "json": export, "run folder": run}


@pytest.mark.parametrize("form", ["text", "json", "run folder"])
def test_evaluate_grammar_takes_every_form(form, grammars, tmp_path):
    (tmp_path / "s.txt").write_text(SENTENCE + "\n")
    (tmp_path / "t.trees").write_text(TREE + "\n")
    out = tmp_path / "scores.json"
    assert main(["evaluate", str(tmp_path / "t.trees"), str(tmp_path / "t.trees"),
                 "--grammar", str(grammars[form]), "--text", str(tmp_path / "s.txt"),
                 "--json", str(out)]) == 0
    likelihood = json.loads(out.read_text())["likelihood"]
    # Published worked example (Manning & Schütze 1999, ch. 11; value from memory):
    # p(astronomers saw stars with ears) = 0.0015876, over 5 words.
    assert likelihood["logprob_per_word"] == pytest.approx(math.log(0.0015876) / 5, rel=1e-5)


@pytest.mark.parametrize("form", ["text", "json", "run folder"])
def test_report_grammar_takes_every_form(form, grammars, tmp_path):
    run = tmp_path / "emptyrun"  # a run folder without its own grammar: --grammar supplies it
    run.mkdir()
    (tmp_path / "gold.trees").write_text(TREE + "\n")
    page = tmp_path / "page.html"
    assert main(["report", str(run), "--grammar", str(grammars[form]), "--gold",
                 str(tmp_path / "gold.trees"), "--out", str(page)]) == 0
    html = page.read_text()
    # The textbook grammar's rules reach the page (its words and symbols), and nothing is
    # reported missing about the grammar.
    assert "astronomers" in html and "telescope" in html
    assert "the trained grammar" not in html


def test_outputs_into_missing_folders_are_written(grammars, tmp_path):
    # Common practice: an output path's missing folders are created (as `mkdir -p` would).
    (tmp_path / "t.trees").write_text(TREE + "\n")
    export = tmp_path / "new" / "deeper" / "g.pcfg"
    assert main(["export", str(TEXTBOOK), "--to", "text", "--out", str(export)]) == 0
    # Reference: the source file itself (the text export loads back with identical rules).
    from treewright.grammar import load_grammar
    assert load_grammar(export).to_text() == load_grammar(TEXTBOOK).to_text()
    scores = tmp_path / "eval" / "scores.json"
    assert main(["evaluate", str(tmp_path / "t.trees"), str(tmp_path / "t.trees"),
                 "--json", str(scores)]) == 0
    # Gold against itself: every bracket matches (F1 = 1 by definition).
    assert json.loads(scores.read_text())["brackets"]["systems"]["model"]["corpus_f1"] == 1.0
    run = tmp_path / "run"
    run.mkdir()
    page = tmp_path / "pages" / "r.html"
    assert main(["report", str(run), "--grammar", str(TEXTBOOK), "--out", str(page)]) == 0
    assert page.read_text().startswith("<!DOCTYPE html>")


def test_an_output_folder_that_cannot_be_made_is_one_line(tmp_path, capsys):
    (tmp_path / "afile").write_text("x")
    assert main(["export", str(TEXTBOOK), "--to", "text",
                 "--out", str(tmp_path / "afile" / "g.pcfg")]) == 1
    err = capsys.readouterr().err
    assert "cannot create the output folder" in err and "Traceback" not in err
