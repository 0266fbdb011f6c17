"""The report's SVG figures, read back with the standard library's XML parser and checked for
what a reader sees: whole-number ticks on counted axes, tree labels that do not overlap, and
baseline lines drawn where their values are.

References: the Turkish Web Treebank (turkish-treebanks on PyPI) for real flat CoNLL-U trees;
hand-made trees; and the rule that a sans-serif glyph advances about 0.6 em on average (common
practice, from memory), used to turn a label's length into a box.
"""

from __future__ import annotations

import itertools
import math
import os
import sysconfig
import xml.etree.ElementTree as ET

import pytest

from treewright.corpus import ReadOptions, read_corpus
from treewright.report.svg import bar_chart, line_chart, tree_svg
from treewright.trees import Tree

SVG = "{http://www.w3.org/2000/svg}"
EM = 0.6   # average advance of a sans-serif glyph, in em (common practice, from memory)


def texts(svg: str, cls: str) -> list[ET.Element]:
    return [t for t in ET.fromstring(svg).iter(f"{SVG}text") if t.get("class") == cls]


def boxes(svg: str) -> list[tuple[float, float, float, float, str]]:
    """(left, top, right, bottom, text) of every node label and word of a drawn tree, from its
    position, its anchor (middle) and its length at EM per character."""
    out = []
    for t in ET.fromstring(svg).iter(f"{SVG}text"):
        if t.get("class") not in ("label", "word"):
            continue
        assert t.get("text-anchor") == "middle"
        size, x, y = float(t.get("font-size")), float(t.get("x")), float(t.get("y"))
        half = EM * size * len(t.text) / 2
        out.append((x - half, y - size, x + half, y, t.text))
    return out


def overlaps(found: list[tuple[float, float, float, float, str]]) -> list[tuple[str, str]]:
    return [(a[4], b[4]) for a, b in itertools.combinations(found, 2)
            if a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]]


def test_counted_axes_have_whole_number_ticks():
    # Steps and cycles are counts, so a tick at 1.5 names nothing (common practice). Ranges
    # of 1, 2, 3 and 40 steps, starting at 0 or 1.
    for last in (1, 2, 3, 40):
        for first in (0, 1):
            svg = line_chart({"dev": [(s, 0.1 * s) for s in range(first, first + last + 1)]},
                             "t")
            ticks = [float(t.text) for t in texts(svg, "tick-x")]
            assert len(ticks) >= 2
            assert all(v == int(v) for v in ticks), ticks
            assert ticks[0] <= first and ticks[-1] >= first + last
    # A y axis is not counted: fractional ticks stay allowed there.
    svg = line_chart({"dev": [(1, 0.1), (2, 0.2)]}, "t")
    assert any(float(t.text) != int(float(t.text)) for t in texts(svg, "tick-y"))


def test_charts_use_the_width_they_are_given():
    # A 1,400 px page holds two charts side by side: each is 640 px wide, and its plot takes
    # most of that (the legend sits below the plot, not beside it).
    series = {f"series {k}": [(s, s * k) for s in range(4)] for k in range(5)}
    root = ET.fromstring(line_chart(series, "t", baselines=[("left-branching", 2.0)]))
    assert float(root.get("width")) == 640
    frame = next(r for r in root.iter(f"{SVG}rect") if r.get("fill") == "none")
    assert float(frame.get("width")) >= 0.8 * 640
    legend = [t for t in root.iter(f"{SVG}text") if t.get("class") == "legend"]
    assert len(legend) == 6
    assert all(float(t.get("y")) > float(frame.get("y")) + float(frame.get("height"))
               for t in legend)
    bars = ET.fromstring(bar_chart(["1-10", "11-20"], {"model": [0.5, 0.4]}, "t"))
    assert float(bars.get("width")) >= 480


def flat_tree() -> Tree:
    # Flat siblings with labels much longer than their one-letter words, as CoNLL-U gold trees
    # built from a head with many dependents have them.
    return Tree("VERB", [Tree("PRON", [Tree("PRON", ["a"]), Tree("PRT", ["b"])]),
                         Tree("CONJ", ["c"]), Tree("VERB", ["d"]), Tree("PRT", ["e"]),
                         Tree("PUNCT", ["?"]), Tree("PROPN", ["f"]), Tree("SCONJ", ["g"])])


def test_tree_labels_and_words_never_overlap_on_hand_made_trees():
    deep = Tree("S", ["x"])
    for k in range(30):
        deep = Tree(f"LONGLABEL{k}", [deep, Tree("Q", ["y"])] if k % 2 else
                    [Tree("Q", ["y"]), deep])
    for tree in (flat_tree(), deep, Tree("A-VERY-LONG-ROOT-LABEL", ["w"]),
                 Tree("X", [Tree("Y", ["is"]), Tree("PUNCTUATION", ["."]),
                            Tree("Z", ["longest-word-of-all"])])):
        svg = tree_svg(tree, "gold")
        found = boxes(svg)
        assert len(found) == len(list(tree.subtrees())) + len(tree.leaves())
        assert overlaps(found) == []


def treebank() -> str:
    path = os.path.join(sysconfig.get_paths()["purelib"], "data", "web.conllu")
    if not os.path.exists(path):
        pytest.skip("turkish-treebanks is not installed")
    return path


def test_tree_labels_never_overlap_on_turkish_gold_trees():
    # The first 40 sentences of the Turkish Web Treebank, as the report draws gold trees
    # (phrase labels from the head's part of speech; flat siblings everywhere).
    path = treebank()
    corpus = read_corpus(path, "conllu", ReadOptions(nonprojective="lift", max_length=30))
    for sentence in corpus.sentences[:40]:
        assert overlaps(boxes(tree_svg(sentence.tree, "gold"))) == [], sentence.sent_id


def test_baseline_lines_sit_at_their_values():
    # A value's height read back from the axis: the tick labels give value -> pixel, and a
    # baseline line's y must map back to the value it stands for.
    lines = [("left-branching", 0.3705), ("right-branching", 0.2069), ("random", 0.2970)]
    svg = line_chart({"dev": [(1, 0.17), (2, 0.20), (3, 0.28)]}, "F1", baselines=lines,
                     y_from_zero=True)
    assert axis_values(svg) == pytest.approx(dict(lines), abs=1e-3)
    assert sorted(t.text for t in texts(svg, "baseline-label")) == sorted(n for n, _ in lines)


def test_perplexity_axis_is_logarithmic_with_round_ticks():
    # Perplexity from 1,100 down to 30, and a unigram baseline at 98: on a log axis every tick
    # is 1, 2 or 5 times a power of ten, equal ratios are equal distances, and the baseline is
    # read back at its value.
    svg = line_chart({"dev": [(0, 1100.0), (1, 40.0), (2, 30.0)]}, "Perplexity",
                     y_label="perplexity", baselines=[("unigram", 98.09)], log_y=True)
    root = ET.fromstring(svg)
    assert root.get("data-y-scale") == "log"
    ticks = [(float(t.text), float(t.get("y"))) for t in texts(svg, "tick-y")]
    for value, _ in ticks:
        mantissa = value / 10 ** math.floor(math.log10(value) + 1e-12)
        assert round(mantissa, 9) in (1, 2, 5), value
    (a, ya), (b, yb) = ticks[0], ticks[-1]
    per_decade = (ya - yb) / math.log10(b / a)
    for value, y in ticks:
        assert ya - y == pytest.approx(per_decade * math.log10(value / a), abs=0.02)
    assert axis_values(svg) == pytest.approx({"unigram": 98.09}, rel=1e-3)
    assert any("log scale" in (t.text or "") for t in root.iter(f"{SVG}text"))
    # Values within a narrow band keep a linear axis (three round log ticks would not fit).
    assert ET.fromstring(line_chart({"d": [(0, 31.0), (1, 33.0)]}, "p", log_y=True)).get(
        "data-y-scale") == "linear"


def axis_values(svg: str) -> dict[str, float]:
    """Each baseline line's name (from its tooltip) and the value at its height, by the straight
    line through two tick labels (a tick label's text baseline is 4 px below its tick)."""
    root = ET.fromstring(svg)
    ticks = [(float(t.text), float(t.get("y")) - 4) for t in texts(svg, "tick-y")]
    if root.get("data-y-scale") == "log":   # equal steps in log10 of the value
        ticks = [(math.log10(v), y) for v, y in ticks]
    (v0, y0), (v1, y1) = ticks[0], ticks[-1]
    scale = (lambda v: 10 ** v) if root.get("data-y-scale") == "log" else (lambda v: v)
    return {line.find(f"{SVG}title").text.rsplit(": ", 1)[0]:
            scale(v0 + (float(line.get("y1")) - y0) * (v1 - v0) / (y1 - y0))
            for line in root.iter(f"{SVG}line") if line.get("class") == "baseline"}
