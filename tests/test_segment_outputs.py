"""A segmentation run's export (`treewright export RUN --to json|text`) and report page
(`treewright report RUN`), against the run's own files and scores computed here."""

from __future__ import annotations

import html
import json
import re
from pathlib import Path

import pytest

from treewright.adaptor.segment import read_utterances
from treewright.cli import main
from treewright.evaluation import evaluate_segmentation

from test_adaptor_morphs import quay_config

REPO = Path(__file__).resolve().parents[1]
OSTRELI = REPO / "src/treewright/data/examples/ostreli.txt"


@pytest.fixture(scope="module")
def word_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("words")
    text = root / "ostreli.txt"
    text.write_text("".join(OSTRELI.read_text(encoding="utf-8").splitlines(keepends=True)[:30]),
                    encoding="utf-8")
    config = root / "segment.yaml"
    config.write_text(json.dumps({"data": {"text": str(text)},
                                  "sampler": {"sweeps": 4, "chains": 2, "seed": 1},
                                  "output": {"stdout_metrics": False}}))
    assert main(["segment", str(config), f"output.run_dir={root / 'run'}"]) == 0
    return root / "run", text


def _page_text(path: Path) -> str:
    page = path.read_text(encoding="utf-8")
    page = re.sub(r"<svg.*?</svg>", " ", page, flags=re.S)
    return re.sub(r"\s+", " ", html.unescape(re.sub(r"<[^>]+>", " ", page)))


def test_the_json_export_holds_the_runs_segmentation_and_lexicon(word_run, tmp_path):
    run, _ = word_run
    out = tmp_path / "seg.json"
    assert main(["export", str(run), "--to", "json", "--out", str(out)]) == 0
    data = json.loads(out.read_text(encoding="utf-8"))
    assert (data["format"], data["version"], data["unit"], data["sweeps"]) == \
        ("treewright segmentation", 1, "words", 4)
    assert data["segmentation"] == [line.split() for line in
                                    (run / "segmentation.txt").read_text().splitlines()]
    assert [[e["unit"], str(e["customers"]), str(e["tables"])] for e in data["lexicon"]] == \
        [line.split("\t") for line in (run / "lexicon.tsv").read_text().splitlines()]
    assert {e["symbol"] for e in data["lexicon"]} == {"Word"}
    # 2 chains, recorded after sweeps 2 and 4 (samples 10, every 2, from sweep 1 on).
    assert data["pooled_analyses"] == 4 == json.loads(
        (run / "chains.json").read_text())["boundaries"]["samples"]
    text = tmp_path / "seg.txt"
    assert main(["export", str(run), "--to", "text", "--out", str(text)]) == 0
    assert text.read_text() == (run / "segmentation.txt").read_text()


def test_other_formats_and_unfinished_runs_are_refused(word_run, tmp_path, capsys):
    run, _ = word_run
    assert main(["export", str(run), "--to", "listing", "--out", "-"]) == 1
    assert "a segmentation run exports as json" in capsys.readouterr().err
    unfinished = tmp_path / "unfinished"
    unfinished.mkdir()
    (unfinished / "config.yaml").write_text((run / "config.yaml").read_text())
    assert main(["export", str(unfinished), "--to", "json", "--out", "-"]) == 1
    assert "no segmentation.txt: not a finished segmentation run" in capsys.readouterr().err
    assert main(["report", str(run), "--gold", "x.trees"]) == 1
    assert "--gold: for training runs" in capsys.readouterr().err
    # Commands that read a grammar say what a segmentation run is read by.
    assert main(["inspect", str(run)]) == 1
    assert "a segmentation run (treewright segment) has no grammar" in capsys.readouterr().err


def test_the_report_scores_the_segmentation_and_shows_curves_and_lexicon(word_run, tmp_path):
    run, text = word_run
    out = tmp_path / "page.html"
    assert main(["report", str(run), "--out", str(out)]) == 0
    page = out.read_text(encoding="utf-8")
    words = _page_text(out)
    # Scores recomputed here from the written segmentation and the gold spaces (the scorer is
    # checked against scikit-learn in test_adaptor_segment.py), with the baselines' rows: no
    # split has boundary F1 0 by the convention of evaluation.segmentation, every character
    # has boundary recall 1 (common practice for boundary scores).
    written = [line.split() for line in (run / "segmentation.txt").read_text().splitlines()]
    scores = evaluate_segmentation(written, read_utterances(text).gold)
    t, b = scores.tokens, scores.boundaries
    row = " ".join(f"{x:.3f}" for x in (t.precision, t.recall, t.f1, b.precision, b.recall, b.f1))
    assert f"this segmentation {row}" in words
    assert re.search(r"no split [0-9.]+ [0-9.]+ [0-9.]+ 0\.000 0\.000 0\.000", words)
    assert re.search(r"every character [0-9.]+ [0-9.]+ [0-9.]+ [0-9.]+ 1\.000", words)
    assert "pools 4 recorded analyses (every chain's late sweeps) by the cut rule" in words
    # The lexicon's most used unit with its counts, and the first utterance beside its gold.
    unit, customers, tables = (run / "lexicon.tsv").read_text().splitlines()[0].split("\t")
    assert f"{unit} {customers} {tables}" in words
    gold = OSTRELI.read_text(encoding="utf-8").splitlines()[0]
    assert f"{' '.join(written[0])} {gold}" in words
    # Four charts, the log joint with one line per chain.
    assert page.count("<svg") == 4
    assert "log joint chain0" in page and "log joint chain1" in page


def test_the_report_of_a_morph_run_scores_the_split_written_words(tmp_path):
    config = quay_config(tmp_path, 2)
    assert main(["segment", str(config), f"output.run_dir={tmp_path / 'run'}"]) == 0
    out = tmp_path / "page.html"
    assert main(["report", str(tmp_path / "run"), "--out", str(out)]) == 0
    words = _page_text(out)
    # The 3 split written words of TOKENIZED (worked out by hand in test_adaptor_morphs.py);
    # splitting every character finds 4 of 18 positions there: precision 0.222, recall 1.
    assert "the 3 written words the corpus writes as two or more tokens" in words
    assert "every character 0.222 1.000 0.364" in words
    assert "Stem" in words and "Suffix" in words


def test_a_report_without_its_input_says_so_and_still_opens(word_run, tmp_path):
    run, text = word_run
    moved = tmp_path / "run"
    moved.mkdir()
    for name in ("config.yaml", "metrics.jsonl", "chains.json", "segmentation.txt",
                 "lexicon.tsv"):
        (moved / name).write_bytes((run / name).read_bytes())
    config = (moved / "config.yaml").read_text(encoding="utf-8")
    (moved / "config.yaml").write_text(config.replace(str(text), str(tmp_path / "gone.txt")),
                                       encoding="utf-8")
    out = tmp_path / "page.html"
    assert main(["report", str(moved), "--out", str(out)]) == 0
    words = _page_text(out)
    assert "gone.txt is not there to score against" in words
    assert "Induced lexicon" in words and out.read_text().count("<svg") == 4
