"""Inline SVG figures for the HTML report: line charts, grouped bars, trees and a span heat map.

Each function returns one `<svg>` element as a string. Every piece of text that reaches the page
(words, labels, series names, titles) goes through `esc`, so corpus words such as `<script>` show
as text and never become markup.
"""

from __future__ import annotations

import html
import math
import unicodedata
from typing import Mapping, Sequence

from treewright.trees import Tree

# A palette that stays distinguishable for the common colour-vision deficiencies (Okabe & Ito,
# "Color Universal Design", 2008; hex values from memory).
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442",
           "#000000")
# Baselines are dashed lines in colours apart from the series' first ones.
BASELINE_COLORS = ("#555555", "#D55E00", "#CC79A7", "#009E73")
FONT = 'font-family="sans-serif"'


def esc(text: object) -> str:
    """Text for HTML/SVG content or attribute values (quotes escaped too)."""
    return html.escape(str(text), quote=True)


def text_width(text: str, size: float) -> float:
    """A generous estimate of the drawn width of `text` in a sans-serif font of `size` px.

    No font metrics are at hand without a browser, so each character is given at least the
    average advance of a sans-serif glyph (about 0.6 em, common practice): lowercase letters
    0.6 em, capitals, digits and other signs 0.72 em, wide East Asian characters 1 em. Layouts
    that reserve this much never overlap in a real font.
    """
    em = 0.0
    for ch in str(text):
        if unicodedata.east_asian_width(ch) in ("W", "F"):
            em += 1.0
        elif ch.islower():
            em += 0.6
        else:
            em += 0.72
    return em * size


def _nice_ticks(low: float, high: float, count: int = 5, integer: bool = False) -> list[float]:
    """About `count` round tick values covering [low, high] (steps of 1, 2 or 5 x 10^k).

    integer: the axis counts whole things (steps, cycles), so the step is a whole number and
    every tick is an integer.
    """
    if high <= low:
        # One value: an axis around it, so that a flat line sits in the middle.
        pad = abs(low) * 0.1 or 1.0
        low, high = low - pad, high + pad
    raw = (high - low) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    if integer:
        step = max(1, round(step))
    first, last = math.floor(low / step + 1e-9), math.ceil(high / step - 1e-9)
    if integer:
        return [float(k * step) for k in range(first, last + 1)]
    return [round(k * step, 12) for k in range(first, last + 1)]


def _log_ticks(low: float, high: float) -> list[float]:
    """Round ticks (1, 2 and 5 x 10^k) of a logarithmic axis covering [low, high] (low > 0);
    only the powers of ten when that still gives three ticks or more."""
    if low <= 0 or high <= low:
        return []
    candidates = [m * 10.0 ** k for k in range(math.floor(math.log10(low)) - 1,
                                               math.ceil(math.log10(high)) + 1)
                  for m in (1, 2, 5)]
    first = max(c for c in candidates if c <= low * (1 + 1e-9))
    last = min(c for c in candidates if c >= high * (1 - 1e-9))
    ticks = [c for c in candidates if first <= c <= last]
    decades = [c for c in ticks if c == 10.0 ** round(math.log10(c))]
    if len(decades) >= 3:
        return sorted({first, *decades, last})
    return ticks


def _fmt(value: float) -> str:
    return f"{value:.4g}"


LEGEND_ROW = 16


def _legend(entries: Sequence[tuple[str, str, str]], x: float, y: float, width: float
            ) -> tuple[list[str], float]:
    """A legend below a plot: (name, colour, dash) entries in one or two columns, as many as fit
    in `width`. dash is "" for a solid line, "box" for a filled square (bars), else a dash
    pattern. Returns the parts and the height used."""
    widest = max((text_width(name, 11) for name, _, _ in entries), default=0.0) + 30
    columns = 2 if len(entries) > 1 and 2 * widest <= width else 1
    rows = math.ceil(len(entries) / columns)
    parts = []
    for k, (name, color, dash) in enumerate(entries):
        xx = x + (k // rows) * width / columns
        yy = y + LEGEND_ROW * (k % rows) + 11
        if dash == "box":
            parts.append(f'<rect x="{xx + 5}" y="{yy - 9}" width="10" height="10" '
                         f'fill="{color}"/>')
        else:
            pattern = f' stroke-dasharray="{dash}"' if dash else ""
            parts.append(f'<line x1="{xx}" x2="{xx + 20}" y1="{yy - 4}" y2="{yy - 4}" '
                         f'stroke="{color}" stroke-width="2.5"{pattern}/>')
        parts.append(f'<text class="legend" x="{xx + 26}" y="{yy}" font-size="11" {FONT}>'
                     f'{esc(name)}</text>')
    return parts, LEGEND_ROW * rows


def line_chart(series: Mapping[str, Sequence[tuple[float, float]]], title: str,
               x_label: str = "step", y_label: str = "", width: int = 640,
               plot_height: int = 220, baselines: Sequence[tuple[str, float]] = (),
               integer_x: bool = True, y_from_zero: bool = False, log_y: bool = False) -> str:
    """One polyline per named series of (x, y) points, and one dashed horizontal line per
    (name, value) baseline, labelled at its right end and in the legend below the plot.
    Non-finite points are left out (a gap in the data, not a drop to zero).

    integer_x: x counts whole things (steps, cycles), so its ticks are integers.
    y_from_zero: the y axis starts at 0 (for proportions such as F1, whose distance from 0 is
    the point).
    log_y: a logarithmic y axis (for perplexity, which falls by orders of magnitude early in
    training); only positive values are drawn. The axis stays linear when the values span too
    little for three round log ticks.
    """
    def drawable(y: float) -> bool:
        return math.isfinite(y) and (y > 0 or not log_y)

    clean = {name: [(float(x), float(y)) for x, y in pts
                    if math.isfinite(float(x)) and drawable(float(y))]
             for name, pts in series.items()}
    clean = {name: pts for name, pts in clean.items() if pts}
    lines = [(name, float(v)) for name, v in baselines if drawable(float(v))]
    left, right, top = 64, 16, 28
    plot_w, plot_h = width - left - right, plot_height
    colors = {name: PALETTE[k % len(PALETTE)] for k, name in enumerate(clean)}
    line_colors = [BASELINE_COLORS[k % len(BASELINE_COLORS)] for k in range(len(lines))]
    entries = [(name, colors[name], "") for name in clean]
    entries += [(f"{name}: {_fmt(v)}", c, "6 4") for (name, v), c in zip(lines, line_colors)]
    legend, legend_h = _legend(entries, left, top + plot_h + 40, plot_w)
    height = top + plot_h + 40 + legend_h + 8
    xs = [x for pts in clean.values() for x, _ in pts] or [0.0]
    ys = [y for pts in clean.values() for _, y in pts] + [v for _, v in lines] or [0.0]
    x_ticks = _nice_ticks(min(xs), max(xs), integer=integer_x)
    y_ticks = _log_ticks(min(ys), max(ys)) if log_y else []
    logarithmic = len(y_ticks) >= 3
    if not logarithmic:
        y_ticks = _nice_ticks(0.0 if y_from_zero else min(ys), max(ys))
    scale = math.log10 if logarithmic else (lambda v: v)
    y_label = f"{y_label} (log scale)" if logarithmic else y_label
    x0, x1 = x_ticks[0], x_ticks[-1]
    y0, y1 = scale(y_ticks[0]), scale(y_ticks[-1])
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" class="figure" width="{width}" '
             f'height="{height}" viewBox="0 0 {width} {height}" role="img" '
             f'data-y-scale="{"log" if logarithmic else "linear"}">',
             f'<title>{esc(title)}</title>',
             f'<text x="{left}" y="18" font-size="13" font-weight="bold" {FONT}>{esc(title)}</text>']
    if not clean and not lines:
        parts.append(f'<text x="{left}" y="{top + plot_h / 2}" font-size="12" {FONT}>'
                     'no finite values to draw</text></svg>')
        return "".join(parts)

    def px(x: float) -> float:
        return left + (x - x0) / (x1 - x0 or 1.0) * plot_w

    def py(y: float) -> float:
        return top + plot_h - (scale(y) - y0) / (y1 - y0 or 1.0) * plot_h

    parts.append(f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" '
                 'stroke="#999"/>')
    for t in y_ticks:
        parts.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{py(t):.2f}" y2="{py(t):.2f}" '
                     f'stroke="#eee"/><text class="tick-y" x="{left - 6}" y="{py(t) + 4:.2f}" '
                     f'font-size="10" text-anchor="end" {FONT}>{_fmt(t)}</text>')
    for t in x_ticks:
        parts.append(f'<text class="tick-x" x="{px(t):.2f}" y="{top + plot_h + 14}" '
                     f'font-size="10" text-anchor="middle" {FONT}>{_fmt(t)}</text>')
    parts.append(f'<text x="{left + plot_w / 2}" y="{top + plot_h + 32}" font-size="11" '
                 f'text-anchor="middle" {FONT}>{esc(x_label)}</text>')
    if y_label:
        parts.append(f'<text x="14" y="{top + plot_h / 2}" font-size="11" text-anchor="middle" '
                     f'transform="rotate(-90 14 {top + plot_h / 2})" {FONT}>{esc(y_label)}</text>')
    # Baseline labels sit just above their lines at the right end, pushed apart when two
    # baselines are closer than a line of text.
    label_y = []
    for (name, value), color in sorted(zip(lines, line_colors), key=lambda e: py(e[0][1])):
        y = py(value)
        parts.append(f'<line class="baseline" x1="{left}" x2="{left + plot_w}" y1="{y:.2f}" '
                     f'y2="{y:.2f}" stroke="{color}" stroke-width="1.5" stroke-dasharray="6 4">'
                     f'<title>{esc(name)}: {_fmt(value)}</title></line>')
        ty = max(y - 3, label_y[-1] + 12) if label_y else y - 3
        label_y.append(ty)
        parts.append(f'<text class="baseline-label" x="{left + plot_w - 4}" y="{ty:.2f}" '
                     f'font-size="10" text-anchor="end" fill="{color}" stroke="#fff" '
                     f'stroke-width="3" paint-order="stroke" {FONT}>{esc(name)}</text>')
    for name, pts in clean.items():
        coords = " ".join(f"{px(x):.2f},{py(y):.2f}" for x, y in sorted(pts))
        parts.append(f'<polyline class="series" fill="none" stroke="{colors[name]}" '
                     f'stroke-width="1.8" points="{coords}"><title>{esc(name)}</title></polyline>')
        if len(pts) == 1:
            x, y = pts[0]
            parts.append(f'<circle cx="{px(x):.2f}" cy="{py(y):.2f}" r="3" fill="{colors[name]}"/>')
    parts += legend
    parts.append("</svg>")
    return "".join(parts)


def bar_chart(categories: Sequence[str], series: Mapping[str, Sequence[float | None]],
              title: str, y_label: str = "", y_max: float = 1.0, width: int | None = None,
              plot_height: int = 220) -> str:
    """Grouped bars: one group per category, one bar per series, the legend below. None draws
    no bar (and says "n/a" under the group's bar position), so a missing value never looks like
    zero."""
    names = list(series)
    left, right, top = 56, 16, 28
    min_group = max(24, 14 * len(names) + 10)
    width = width or max(480, left + right + min_group * max(len(categories), 1))
    plot_w, plot_h = width - left - right, plot_height
    group_w = plot_w / max(len(categories), 1)
    bar_w = (group_w - 8) / max(len(names), 1)
    # Category names are drawn turned by 30 degrees: their drop is half their length.
    drop = 0.5 * max((text_width(c, 10) for c in categories), default=0.0) + 20
    legend, legend_h = _legend([(name, PALETTE[k % len(PALETTE)], "box")
                                for k, name in enumerate(names)],
                               left, top + plot_h + drop, plot_w)
    height = int(top + plot_h + drop + legend_h + 8)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" class="figure" width="{width}" '
             f'height="{height}" viewBox="0 0 {width} {height}" role="img">',
             f'<title>{esc(title)}</title>',
             f'<text x="{left}" y="18" font-size="13" font-weight="bold" {FONT}>{esc(title)}</text>',
             f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" '
             'stroke="#999"/>']
    for t in _nice_ticks(0.0, y_max):
        y = top + plot_h - t / y_max * plot_h
        parts.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{y:.2f}" y2="{y:.2f}" '
                     f'stroke="#eee"/><text class="tick-y" x="{left - 6}" y="{y + 4:.2f}" '
                     f'font-size="10" text-anchor="end" {FONT}>{_fmt(t)}</text>')
    if y_label:
        parts.append(f'<text x="14" y="{top + plot_h / 2}" font-size="11" text-anchor="middle" '
                     f'transform="rotate(-90 14 {top + plot_h / 2})" {FONT}>{esc(y_label)}</text>')
    for g, category in enumerate(categories):
        gx = left + g * group_w + 4
        for k, name in enumerate(names):
            value = series[name][g]
            x = gx + k * bar_w
            if value is None or not math.isfinite(value):
                parts.append(f'<text x="{x + bar_w / 2:.1f}" y="{top + plot_h - 3}" '
                             f'font-size="8" text-anchor="middle" {FONT}>n/a</text>')
                continue
            h = max(0.0, min(value, y_max)) / y_max * plot_h
            parts.append(f'<rect class="bar" x="{x:.1f}" y="{top + plot_h - h:.1f}" '
                         f'width="{max(bar_w - 1, 1):.1f}" height="{h:.1f}" '
                         f'fill="{PALETTE[k % len(PALETTE)]}"><title>{esc(name)}, '
                         f'{esc(category)}: {_fmt(value)}</title></rect>')
        cx = gx + (group_w - 8) / 2
        parts.append(f'<text x="{cx:.1f}" y="{top + plot_h + 14}" font-size="10" '
                     f'text-anchor="end" transform="rotate(-30 {cx:.1f} {top + plot_h + 14})" '
                     f'{FONT}>{esc(category)}</text>')
    parts += legend
    parts.append("</svg>")
    return "".join(parts)


LABEL_SIZE, WORD_SIZE, GAP = 12, 12, 10


def tree_svg(tree: Tree, title: str = "") -> str:
    """A tree drawn top-down: each node on the row of its depth, words on the bottom row.

    Each node gets an interval of the page at least as wide as its label (plus a gap) and as
    the intervals of its children side by side; children are centred within it. A node's label
    sits over its children, kept inside its own interval. Nodes of one depth have disjoint
    intervals, so their labels never overlap, nor do the words; and a subtree is drawn inside its
    interval, so no line crosses into a sibling's subtree.
    """
    level_h, top = 38, 24 if title else 8
    # Depth of every node, by an iterative pre-order walk (trees may nest deeply).
    depth: dict[int, int] = {id(tree): 0}
    order: list[Tree] = []
    stack: list[Tree] = [tree]
    while stack:
        node = stack.pop()
        order.append(node)
        for child in node.children:
            if isinstance(child, Tree):
                depth[id(child)] = depth[id(node)] + 1
        stack.extend(c for c in reversed(node.children) if isinstance(c, Tree))
    deepest = max(depth.values())
    label_w = {id(n): text_width(n.label, LABEL_SIZE) for n in order}
    # Post-order: a node's interval width covers its label and its children's intervals.
    span: dict[int, float] = {}
    for node in reversed(order):
        inner = sum(span[id(c)] if isinstance(c, Tree) else text_width(c, WORD_SIZE) + GAP
                    for c in node.children)
        span[id(node)] = max(label_w[id(node)] + GAP, inner)
    # Pre-order: place each node's children side by side, centred in its interval.
    start: dict[int, float] = {id(tree): 8.0}
    word_x: dict[tuple[int, int], float] = {}
    for node in order:
        inner = sum(span[id(c)] if isinstance(c, Tree) else text_width(c, WORD_SIZE) + GAP
                    for c in node.children)
        cursor = start[id(node)] + (span[id(node)] - inner) / 2
        for k, child in enumerate(node.children):
            if isinstance(child, Tree):
                start[id(child)] = cursor
                cursor += span[id(child)]
            else:
                w = text_width(child, WORD_SIZE) + GAP
                word_x[(id(node), k)] = cursor + w / 2
                cursor += w
    # Post-order: over the middle of its children, clamped into its own interval.
    x_of: dict[int, float] = {}
    for node in reversed(order):
        xs = [x_of[id(c)] if isinstance(c, Tree) else word_x[(id(node), k)]
              for k, c in enumerate(node.children)]
        s, half = start[id(node)], (label_w[id(node)] + GAP) / 2
        middle = (xs[0] + xs[-1]) / 2 if xs else s + span[id(node)] / 2
        x_of[id(node)] = min(max(middle, s + half), s + span[id(node)] - half)
    word_y = top + (deepest + 1) * level_h + 10
    width, height = int(span[id(tree)] + 16), int(word_y + 8)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" class="tree" width="{width}" '
             f'height="{height}" viewBox="0 0 {width} {height}" role="img">']
    if title:
        parts.append(f'<text x="4" y="14" font-size="12" font-weight="bold" {FONT}>'
                     f'{esc(title)}</text>')
    for node in order:
        x, y = x_of[id(node)], top + depth[id(node)] * level_h + 12
        for k, child in enumerate(node.children):
            if isinstance(child, Tree):
                cx, cy = x_of[id(child)], top + depth[id(child)] * level_h
            else:
                cx, cy = word_x[(id(node), k)], word_y - 12
            parts.append(f'<line x1="{x:.1f}" y1="{y + 4:.1f}" x2="{cx:.1f}" y2="{cy:.1f}" '
                         'stroke="#888"/>')
        parts.append(f'<text class="label" x="{x:.1f}" y="{y:.1f}" font-size="{LABEL_SIZE}" '
                     f'text-anchor="middle" fill="#0072B2" {FONT}>{esc(node.label)}</text>')
    for owner, k, word in tree.word_slots():
        parts.append(f'<text class="word" x="{word_x[(id(owner), k)]:.1f}" y="{word_y:.1f}" '
                     f'font-size="{WORD_SIZE}" text-anchor="middle" {FONT}>{esc(word)}</text>')
    parts.append("</svg>")
    return "".join(parts)


def span_heatmap(marginals: Sequence[Sequence[float]], words: Sequence[str], title: str,
                 cell: int = 34) -> str:
    """Posterior span marginals of one sentence: the cell in column `start`, row `width`
    (width 2 at the bottom, the whole sentence at the top) is shaded by p(span | sentence)."""
    n = len(words)
    label_w = 8 * max((len(w) for w in words), default=1) + 10
    left, top = 56, 28
    width = left + max(n * cell, 1) + 16
    height = top + max(n - 1, 1) * cell + label_w + 20
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" class="figure heatmap" width="{width}" '
             f'height="{height}" viewBox="0 0 {width} {height}" role="img">',
             f'<title>{esc(title)}</title>',
             f'<text x="4" y="18" font-size="13" font-weight="bold" {FONT}>{esc(title)}</text>']
    for w in range(2, n + 1):
        y = top + (n - w) * cell
        parts.append(f'<text x="{left - 6}" y="{y + cell / 2 + 4:.1f}" font-size="10" '
                     f'text-anchor="end" {FONT}>w={w}</text>')
        for i in range(n - w + 1):
            p = float(marginals[i][w])
            p = min(max(p, 0.0), 1.0) if math.isfinite(p) else 0.0
            shade = int(round(255 * (1 - p)))
            parts.append(f'<rect class="cell" x="{left + i * cell}" y="{y}" width="{cell - 1}" '
                         f'height="{cell - 1}" fill="rgb({shade},{shade},255)" stroke="#ccc">'
                         f'<title>{esc(" ".join(words[i:i + w]))}: {p:.3f}</title></rect>')
            if p >= 0.005:
                ink = "#fff" if p > 0.6 else "#000"
                parts.append(f'<text x="{left + i * cell + cell / 2:.1f}" y="{y + cell / 2 + 4:.1f}"'
                             f' font-size="9" text-anchor="middle" fill="{ink}" {FONT}>'
                             f'{p:.2f}</text>')
    base = top + max(n - 1, 1) * cell + 8
    for i, word in enumerate(words):
        x = left + i * cell + cell / 2
        parts.append(f'<text class="word" x="{x:.1f}" y="{base}" font-size="11" '
                     f'text-anchor="end" transform="rotate(-60 {x:.1f} {base})" {FONT}>'
                     f'{esc(word)}</text>')
    parts.append("</svg>")
    return "".join(parts)
