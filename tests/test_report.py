"""The HTML report's structure, read back with the standard library's html.parser.

References: a two-tree grammar whose span posteriors are worked by hand (below), hand-worked
bracket scores, and the HTML rule that text content is escaped (a corpus word `<script>` must
arrive as text, never as an element).
"""

from __future__ import annotations

import argparse
import json
import math
import re
import xml.etree.ElementTree as ET
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
        self.classed: list[tuple[str, str]] = []   # (class of the enclosing element, text)
        self.feed(text)

    def spans(self, cls: str) -> list[str]:
        """The text of every element of class `cls`, in page order."""
        return [d for c, d in self.classed if c == cls]

    @property
    def tree_labels(self) -> list[str]:
        return self.spans("label")

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
        if self.stack:
            self.classed.append((self.stack[-1], data))
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


SVG = "{http://www.w3.org/2000/svg}"


def figures(text: str) -> dict[str, ET.Element]:
    """Every chart of the page by its title, parsed as XML."""
    found = {}
    for svg in re.findall(r'<svg .*?</svg>', text, flags=re.S):
        root = ET.fromstring(svg)
        title = root.find(f"{SVG}title")
        if title is not None:
            found[title.text] = root
    return found


def classed(root: ET.Element, tag: str, cls: str) -> list[ET.Element]:
    return [e for e in root.iter(f"{SVG}{tag}") if e.get("class") == cls]


def write_records(run: Path, records: list[dict]) -> None:
    (run / "metrics.jsonl").write_text("\n".join(json.dumps(r) for r in records) + "\n",
                                       encoding="utf-8")


BASELINES = {"baseline/unigram_dev_loglik_per_word": -4.5859,
             "baseline/dev_left_branching_sentence_f1": 0.3705,
             "baseline/dev_right_branching_sentence_f1": 0.2069,
             "baseline/dev_random_binary_sentence_f1": 0.2970}


def test_curves_are_named_in_words_and_baselines_drawn_at_their_values(run_dir):
    records = [dict(BASELINES, step=0, time=0.0),
               {"step": 0, "restart": 0, "init/dev_loglik_per_word": -5.8,
                "init/dev_perplexity": 330.0, "init/dev_sentence_f1": 0.22}]
    records += [{"step": s, "restart": 0, "train/loglik_per_word": -5.0 + 0.1 * s,
                 "dev/loglik_per_word": -4.9 + 0.05 * s, "dev/perplexity": 140.0 - s,
                 "dev/sentence_f1": 0.2 + 0.03 * s, "dev/corpus_f1": 0.21 + 0.02 * s,
                 "dev/head_attachment_f1": 0.1 * s}     # a key the report has no name for
                for s in (1, 2, 3)]
    write_records(run_dir, records)
    text = build_report(run_dir)
    charts = figures(text)
    keys = {k for r in records for k in r}
    # No legend shows a raw key of metrics.jsonl (the keys are read back from the file).
    legends = [t.text for root in charts.values() for t in classed(root, "text", "legend")]
    assert legends
    for name in legends:
        assert not any(key in name for key in keys if "/" in key), name
        assert "/" not in name and "_" not in name, name
    assert "dev head attachment F1" in legends    # Counted x axes: whole-number ticks only (common practice).
    for root in charts.values():
        assert all(float(t.text) == int(float(t.text)) for t in classed(root, "text", "tick-x"))
    # The dev F1 chart draws the three bracket baselines, and the likelihood chart the unigram
    # one, each at the value metrics.jsonl holds; the perplexity chart draws the unigram line
    # at exp(-loglik), the definition of perplexity (common practice).
    f1 = axis_values(charts["Dev bracket F1"])
    assert sorted(f1.values()) == pytest.approx(sorted(
        v for k, v in BASELINES.items() if k.endswith("_f1")), abs=2e-3)
    assert "left-branching, sentence F1" in f1
    assert list(axis_values(charts["Log-likelihood per word"]).values()) == pytest.approx(
        [BASELINES["baseline/unigram_dev_loglik_per_word"]], abs=2e-3)
    assert list(axis_values(charts["Perplexity"]).values()) == pytest.approx(
        [math.exp(4.5859)], rel=2e-3)
    # The starting grammar's dev score begins the dev curve at step 0 (one polyline, not a dot).
    dev = [p for p in classed(charts["Dev bracket F1"], "polyline", "series")
           if p.find(f"{SVG}title").text.startswith("sentence F1")]
    assert len(dev) == 1 and len(dev[0].get("points").split()) == 4


def axis_values(root: ET.Element) -> dict[str, float]:
    """Baseline name -> the value at its line's height, read off two tick labels (a tick
    label's text baseline is 4 px below its tick)."""
    ticks = [(float(t.text), float(t.get("y")) - 4) for t in classed(root, "text", "tick-y")]
    if root.get("data-y-scale") == "log":   # equal steps in log10 of the value
        ticks = [(math.log10(v), y) for v, y in ticks]
    (v0, y0), (v1, y1) = ticks[0], ticks[-1]
    scale = (lambda v: 10 ** v) if root.get("data-y-scale") == "log" else (lambda v: v)
    return {line.find(f"{SVG}title").text.rsplit(": ", 1)[0]:
            scale(v0 + (float(line.get("y1")) - y0) * (v1 - v0) / (y1 - y0))
            for line in classed(root, "line", "baseline")}


def test_examples_are_named_by_conllu_sent_id(run_dir, tmp_path):
    # Reference: the "# sent_id = ..." comments of the file, read here line by line.
    gold = tmp_path / "named.conllu"
    block = "1\tka\t_\tNOUN\t_\t_\t2\tnsubj\t_\t_\n2\tlo\t_\tVERB\t_\t_\t0\troot\t_\t_\n"
    gold.write_text(f"# sent_id = kethra-harbour-7\n# text = ka lo\n{block}\n"
                    f"# text = ka lo\n{block}\n# sent_id = kethra-harbour-9\n{block}\n",
                    encoding="utf-8")
    ids = [line.split("=", 1)[1].strip() for line in gold.read_text().splitlines()
           if line.startswith("# sent_id")]
    page = Page(build_report(run_dir, gold=gold))
    names = page.spans("name")
    # Three examples and the heat map's sentence; the second sentence has no id, so it is
    # named by its first line (line 6: two comments, two words, a blank line come before).
    assert names[:3] == [ids[0], "line 6", ids[1]]
    assert names[3] == ids[0]


def test_turkish_examples_are_named_by_sent_id(tmp_path):
    import sysconfig
    source = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"
    if not source.exists():
        pytest.skip("turkish-treebanks is not installed")
    blocks = source.read_text(encoding="utf-8").split("\n\n")[:3]
    gold = tmp_path / "web3.conllu"
    gold.write_text("\n\n".join(blocks) + "\n\n", encoding="utf-8")
    ids = [line.split("=", 1)[1].strip() for b in blocks for line in b.splitlines()
           if line.startswith("# sent_id")]
    words = sorted({line.split("\t")[1] for b in blocks for line in b.splitlines()
                    if line and line[0].isdigit()})
    run = tmp_path / "run"
    run.mkdir()
    # A grammar that parses any string of these words (one preterminal, one nonterminal).
    share = 1 / len(words)
    (run / "grammar.pcfg").write_text(
        "@start ROOT\nROOT -> X 1.0\nX -> X X 0.5\nX -> W W 0.5\n"
        + "".join(f'W -> "{w}" {share}\n' for w in words), encoding="utf-8")
    page = Page(build_report(run, gold=gold, examples=3, max_example_words=100))
    assert page.spans("name")[:3] == ids


REFINED = """@start ROOT
ROOT -> S·0 0.5
ROOT -> S·1 0.5
S·0 -> A·0 Q·0 0.5
S·0 -> P·0 A·0 0.5
S·1 -> A·0 Q·0 0.2
S·1 -> P·0 A·0 0.8
A·0 -> P·0 Q·0 0.6
A·0 -> Q·0 P·0 0.4
P·0 -> "ka" 1.0
Q·0 -> "lo" 1.0
"""


def test_refine_run_shows_held_out_f1_and_decodes_with_max_rule_product(tmp_path):
    run = tmp_path / "refine"
    run.mkdir()
    (run / "grammar.pcfg").write_text(REFINED, encoding="utf-8")
    (run / "config.yaml").write_text("data:\n  start: treebank\nrefine:\n  cycles: 2\n"
                                     "output:\n  f1_decoder: max-rule-product\n",
                                     encoding="utf-8")
    f1 = [0.61, 0.7234, 0.7766]
    write_records(run, [{"step": c, "cycle": c, "fine_symbols": 4 + c,
                         "train/loglik_per_word": -3 + 0.1 * c,
                         "heldout/loglik_per_word": -3.2 + 0.1 * c,
                         "heldout/labeled_precision": f1[c], "heldout/labeled_recall": f1[c],
                         "heldout/labeled_f1": f1[c]} for c in range(3)])
    gold = tmp_path / "gold.trees"
    gold.write_text("(S (A (P ka) (Q lo)) (Q lo))\n(S (P ka) (A (P ka) (Q lo)))\n",
                    encoding="utf-8")
    text = build_report(run, gold=gold)
    # The last cycle's held-out labelled F1, in percent with one decimal, heads the page.
    assert "Held-out labelled F1 after cycle 2:" in text and "<b>77.7</b>" in text
    charts = figures(text)
    lines = classed(charts["Held-out labelled F1"], "polyline", "series")
    assert {p.find(f"{SVG}title").text for p in lines} == {
        "labelled F1", "labelled precision", "labelled recall"}
    ticks = [t.text for t in classed(charts["Held-out labelled F1"], "text", "tick-x")]
    assert ticks == ["0", "1", "2"]
    # A refined grammar is decoded with max-rule-product, and the page says so; its trees
    # carry the coarse labels (S, A, P, Q), never subcategories.
    assert "decoded with max-rule-product, the decoder for refined grammars" in text
    page = Page(text)
    assert not any("·" in d for d in page.tree_labels)
    # No card says "root 0.000": the root probability is shown only where it is not zero, and
    # a small one keeps a significant digit.
    assert "root 0.000" not in text
    (run / "grammar.pcfg").write_text(REFINED.replace("ROOT -> S·0 0.5", "ROOT -> S·0 0.0002")
                                      .replace("ROOT -> S·1 0.5", "ROOT -> S·1 0.9998"),
                                      encoding="utf-8")
    small = build_report(run, gold=gold)
    assert "root 0.000" not in small and "root 2e-04" in small
    # An unrefined grammar gets mbr by default, and the page says so.
    (run / "grammar.pcfg").write_text(GRAMMAR, encoding="utf-8")
    assert "trees decoded with mbr" in build_report(run, gold=gold)


def brute_uses(rules: dict[str, list[tuple[list[str], float]]], symbol: str) -> dict[str, float]:
    """Expected occurrences of every symbol in a tree from `symbol`, by enumerating every tree
    of a grammar without recursion (independent of the report's linear solve)."""
    out: dict[str, float] = {symbol: 1.0}
    for rhs, p in rules.get(symbol, []):
        for child in rhs:
            for name, count in brute_uses(rules, child).items():
                out[name] = out.get(name, 0.0) + p * count
    return out


def test_symbols_are_ranked_by_expected_uses(run_dir):
    from treewright.grammar import load_grammar
    from treewright.report.html import expected_uses

    # GRAMMAR's rules, nonterminals and preterminals (the evil word stands for any word).
    rules = {"ROOT": [(["S"], 0.7), (["A"], 0.3)],
             "S": [(["A", "Q"], 0.5), (["P", "A"], 0.5)],
             "A": [(["P", "Q"], 0.6), (["Q", "P"], 0.4)]}
    expected = brute_uses(rules, "ROOT")       # by hand: S 0.7, A 1.0, P 1.35, Q 1.35
    grammar = load_grammar(run_dir / "grammar.pcfg")
    uses = expected_uses(grammar)
    for k, name in enumerate(grammar.symbols):
        assert float(uses[k]) == pytest.approx(expected[name], abs=1e-12)
    text = build_report(run_dir)
    assert "1.35 per tree" in text and "0.70 per tree, root 0.700" in text


def test_refined_treebank_trees_are_shown_and_scored_without_the_cnf_nodes(tmp_path):
    # A grammar refined from binarized trees has intermediate nodes (BIN_MARK, "¤"); the gold
    # tree is the treebank's flat one. Undone, the prediction equals the gold tree, so its one
    # counted bracket (ka lo mi) is right: corpus F1 100 (by hand). Left in, the extra
    # bracket (lo mi) would halve precision.
    run = tmp_path / "refine"
    run.mkdir()
    (run / "grammar.pcfg").write_text(
        "@start ROOT\nROOT -> S·0 1.0\nS·0 -> X·0 D·0 1.0\nX·0 -> A·0 \u00a4X·0 1.0\n"
        "\u00a4X·0 -> B·0 C·0 1.0\n"
        'A·0 -> "ka" 1.0\nB·0 -> "lo" 1.0\nC·0 -> "mi" 1.0\nD·0 -> "su" 1.0\n',
        encoding="utf-8")
    (run / "config.yaml").write_text("refine:\n  cycles: 1\n", encoding="utf-8")
    gold = tmp_path / "gold.trees"
    gold.write_text("(S (X (A ka) (B lo) (C mi)) (D su))\n", encoding="utf-8")
    page = Page(build_report(run, gold=gold))
    assert not any("\u00a4" in label or "·" in label for label in page.tree_labels)
    assert page.tree_labels.count("X") == 2          # predicted and gold
    cells = page.data
    model = cells.index("model")
    assert cells[model + 1] == "100.0" and cells[model + 2] == "100.0"


def test_a_run_whose_grammar_cannot_be_loaded_is_reported_without_it(tmp_path, monkeypatch):
    # The run's config gives NT x (NT + T)^2 float64 entries, held RULE_TENSOR_COPIES times,
    # more than the (patched) free memory: the grammar file, which would load, is left out
    # with the reason, and the curves are still drawn.
    from treewright import grammar as grammar_module
    from treewright.report import html as html_module
    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_text("@start S\nS -> A A 1.0\nA -> \"a\" 1.0\n")
    (run / "config.yaml").write_text("model:\n  nonterminals: 1024\n  preterminals: 2048\n")
    (run / "metrics.jsonl").write_text(
        "".join(json.dumps({"step": k, "train/loglik_per_word": -5.0 + k / 10}) + "\n"
                for k in range(1, 4)))
    need = grammar_module.RULE_TENSOR_COPIES * 1024 * 3072 ** 2 * 8
    monkeypatch.setattr(grammar_module, "available_bytes", lambda: need - 1)
    found = html_module.gather(run)
    assert found.grammar is None and len(found.metrics) == 3
    assert any("not loaded" in m and "(1024, 3072, 3072)" in m for m in found.missing)
    monkeypatch.setattr(grammar_module, "available_bytes", lambda: need)
    assert html_module.gather(run).grammar is not None
