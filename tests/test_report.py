"""The HTML report's structure, read back with the standard library's html.parser.

References: a two-tree grammar whose span posteriors are worked by hand (below), hand-worked
bracket scores, and the HTML rule that text content is escaped (a corpus word `<script>` must
arrive as text, never as an element).
"""

from __future__ import annotations

import argparse
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from treewright.cli import report as report_cmd
from treewright.report.html import build_report

EVIL = "<script>alert(1)</script>"

GRAMMAR = f"""@start ROOT
ROOT -> S 0.7
ROOT -> A 0.3
S -> A Q 0.5
S -> P A 0.5
A -> P Q 0.6
A -> Q P 0.4
P -> "ka" 0.5
P -> "{EVIL}" 0.5
Q -> "lo" 0.4
Q -> "{EVIL}" 0.6
"""
# "ka EVIL lo" has exactly two trees (by hand):
#   (S (A (P ka) (Q EVIL)) (Q lo)): 0.7 * 0.5 * 0.6 * 0.5 * 0.6 * 0.4 = 0.0252
#   (S (P ka) (A (P EVIL) (Q lo))): 0.7 * 0.5 * 0.5 * 0.6 * 0.5 * 0.4 = 0.021
P_LEFT = 0.0252 / (0.0252 + 0.021)

CONLLU = (f"1\tka\t_\tNOUN\t_\t_\t2\tnsubj\t_\t_\n2\t{EVIL}\t_\t<i>V</i>\t_\t_\t0\troot\t_\t_\n"
          "3\tlo\t_\tNOUN\t_\t_\t2\tobj\t_\t_\n\n")


class Page(HTMLParser):
    """Start tags with their attributes, the text, and the titles of heat-map cells."""

    def __init__(self, text: str):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.data: list[str] = []
        self.stack: list[str] = []
        self.cell_titles: list[str] = []
        self.section_ids: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "section":
            self.section_ids.append(attrs.get("id"))
        self.stack.append(attrs.get("class") or tag)

    def handle_endtag(self, tag):
        if self.stack:
            self.stack.pop()

    def handle_data(self, data):
        self.data.append(data)
        if len(self.stack) >= 2 and self.stack[-1] == "title" and self.stack[-2] == "cell":
            self.cell_titles.append(data)

    def count(self, tag: str, cls: str | None = None) -> int:
        return sum(t == tag and (cls is None or cls in (a.get("class") or "").split())
                   for t, a in self.tags)


@pytest.fixture
def run_dir(tmp_path) -> Path:
    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_text(GRAMMAR, encoding="utf-8")
    (run / "config.yaml").write_text(f"data:\n  train: {EVIL}.txt\n", encoding="utf-8")
    lines = [json.dumps({"step": s, "time": 0.0, "restart": r, "train/loglik_per_word": -3.0 + s,
                         "dev/loglik_per_word": -3.5 + s, "dev/perplexity": 30.0 - s,
                         "dev/sentence_f1": "nan" if s == 1 else 0.1 * s})
             for r in (0, 1) for s in (1, 2, 3)]
    (run / "metrics.jsonl").write_text("\n".join(lines) + '\n{"step": 4, "tra', encoding="utf-8")
    (tmp_path / "gold.conllu").write_text(CONLLU, encoding="utf-8")
    return run


def test_page_structure_escaping_and_heatmap(run_dir):
    text = build_report(run_dir, gold=run_dir.parent / "gold.conllu")
    page = Page(text)
    assert page.section_ids == ["curves", "evaluation", "grammar", "examples", "heatmap", "config"]
    # The escaping rule of HTML: the corpus word is text, so no script element exists at all,
    # and the label <i>V</i> makes no <i> element.
    assert page.count("script") == 0 and page.count("i") == 0
    assert any(EVIL in d for d in page.data) and any("<i>V</i>" in d for d in page.data)
    # Self-contained: nothing to fetch (no src, no stylesheet links, only in-page anchors).
    assert all("src" not in attrs for _, attrs in page.tags)
    assert page.count("link") == 0
    assert all(a["href"].startswith("#") for t, a in page.tags if t == "a" and "href" in a)
    # Figures: three curve charts with one polyline per metric and restart (likelihood: train
    # and dev; perplexity: dev; F1: dev; two restarts each), F1 by length, the heat map, and
    # the predicted and the gold tree.
    assert page.count("svg", "figure") == 5 and page.count("svg", "tree") == 2
    assert page.count("polyline", "series") == (2 + 1 + 1) * 2
    # Hand-worked span posteriors of the two-tree sentence: (0,2) and (1,3).
    cells = dict(t.rsplit(": ", 1) for t in page.cell_titles)
    assert float(cells[f"ka {EVIL}"]) == pytest.approx(P_LEFT, abs=5e-4)
    assert float(cells[f"{EVIL} lo"]) == pytest.approx(1 - P_LEFT, abs=5e-4)
    # The truncated last line of metrics.jsonl is reported, not silently ignored.
    assert "line 7" in text


def test_bracket_scores_on_the_page(tmp_path, run_dir):
    # Hand-worked: gold (X (X a b) c) has the span (0,2); left-branching predicts it
    # (F1 100), right-branching predicts (1,3) (F1 0).
    gold = tmp_path / "gold.trees"
    gold.write_text("(X (X (P ka) (Q lo)) (P ka))\n", encoding="utf-8")
    page = Page(build_report(run_dir, gold=gold))
    cells = page.data  # the score table comes before the figures, so index() finds its row
    left = cells.index("left-branching")
    right = cells.index("right-branching")
    assert cells[left + 1] == "100.0" and cells[right + 1] == "0.0"


def test_missing_pieces_are_named(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    text = build_report(empty)
    page = Page(text)
    assert page.section_ids == ["curves", "evaluation", "grammar", "examples", "heatmap", "config"]
    for name in ("config.yaml", "metrics.jsonl", "grammar.pcfg", "--gold"):
        assert name in text
    assert page.count("svg") == 0


def test_report_command_writes_the_page(run_dir, tmp_path):
    out = tmp_path / "page.html"
    parser = argparse.ArgumentParser()
    report_cmd.add_arguments(parser)
    args = parser.parse_args([str(run_dir), "--gold", str(run_dir.parent / "gold.conllu"),
                              "--out", str(out), "--decoder", "viterbi"])
    assert report_cmd.run(args) == 0
    text = out.read_text(encoding="utf-8")
    assert re.search(r"decoded with viterbi", text)
    assert Page(text).count("svg", "tree") == 2
