"""Inline SVG figures for the HTML report: line charts, grouped bars, trees and a span heat map.

Each function returns one `<svg>` element as a string. Every piece of text that reaches the page
(words, labels, series names, titles) goes through `esc`, so corpus words such as `<script>` show
as text and never become markup.
"""

from __future__ import annotations

import html
import math
from typing import Mapping, Sequence

from treewright.trees import Tree

# A palette that stays distinguishable for the common colour-vision deficiencies (Okabe & Ito,
# "Color Universal Design", 2008; hex values from memory).
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442",
           "#000000")
FONT = 'font-family="sans-serif"'


def esc(text: object) -> str:
    """Text for HTML/SVG content or attribute values (quotes escaped too)."""
    return html.escape(str(text), quote=True)


def _nice_ticks(low: float, high: float, count: int = 5) -> list[float]:
    """About `count` round tick values covering [low, high] (steps of 1, 2 or 5 x 10^k)."""
    if high <= low:
        high = low + 1.0
    raw = (high - low) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first, last = math.floor(low / step + 1e-9), math.ceil(high / step - 1e-9)
    return [round(k * step, 12) for k in range(first, last + 1)]


def _fmt(value: float) -> str:
    return f"{value:.4g}"


def _legend(names: Sequence[str], x: float, y: float) -> list[str]:
    parts = []
    for k, name in enumerate(names):
        color = PALETTE[k % len(PALETTE)]
        yy = y + 16 * k
        parts.append(f'<rect x="{x}" y="{yy - 9}" width="10" height="10" fill="{color}"/>'
                     f'<text x="{x + 14}" y="{yy}" font-size="11" {FONT}>{esc(name)}</text>')
    return parts


def line_chart(series: Mapping[str, Sequence[tuple[float, float]]], title: str,
               x_label: str = "step", y_label: str = "", width: int = 640,
               height: int = 300) -> str:
    """One polyline per named series of (x, y) points; non-finite points are left out (a gap
    in the data, not a drop to zero)."""
    clean = {name: [(float(x), float(y)) for x, y in pts
                    if math.isfinite(float(x)) and math.isfinite(float(y))]
             for name, pts in series.items()}
    clean = {name: pts for name, pts in clean.items() if pts}
    left, right, top, bottom = 64, 230, 28, 44
    plot_w, plot_h = width - left - right, height - top - bottom
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" class="figure" width="{width}" '
             f'height="{height}" viewBox="0 0 {width} {height}" role="img">',
             f'<title>{esc(title)}</title>',
             f'<text x="{left}" y="18" font-size="13" font-weight="bold" {FONT}>{esc(title)}</text>']
    if not clean:
        parts.append(f'<text x="{left}" y="{top + plot_h / 2}" font-size="12" {FONT}>'
                     'no finite values to draw</text></svg>')
        return "".join(parts)
    xs = [x for pts in clean.values() for x, _ in pts]
    ys = [y for pts in clean.values() for _, y in pts]
    x_ticks = _nice_ticks(min(xs), max(xs))
    y_ticks = _nice_ticks(min(ys), max(ys))
    x0, x1, y0, y1 = x_ticks[0], x_ticks[-1], y_ticks[0], y_ticks[-1]

    def px(x: float) -> float:
        return left + (x - x0) / (x1 - x0 or 1.0) * plot_w

    def py(y: float) -> float:
        return top + plot_h - (y - y0) / (y1 - y0 or 1.0) * plot_h

    parts.append(f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" '
                 'stroke="#999"/>')
    for t in y_ticks:
        parts.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{py(t):.1f}" y2="{py(t):.1f}" '
                     f'stroke="#eee"/><text x="{left - 6}" y="{py(t) + 4:.1f}" font-size="10" '
                     f'text-anchor="end" {FONT}>{_fmt(t)}</text>')
    for t in x_ticks:
        parts.append(f'<text x="{px(t):.1f}" y="{top + plot_h + 14}" font-size="10" '
                     f'text-anchor="middle" {FONT}>{_fmt(t)}</text>')
    parts.append(f'<text x="{left + plot_w / 2}" y="{height - 8}" font-size="11" '
                 f'text-anchor="middle" {FONT}>{esc(x_label)}</text>')
    if y_label:
        parts.append(f'<text x="14" y="{top + plot_h / 2}" font-size="11" text-anchor="middle" '
                     f'transform="rotate(-90 14 {top + plot_h / 2})" {FONT}>{esc(y_label)}</text>')
    for k, (name, pts) in enumerate(clean.items()):
        color = PALETTE[k % len(PALETTE)]
        coords = " ".join(f"{px(x):.1f},{py(y):.1f}" for x, y in sorted(pts))
        parts.append(f'<polyline class="series" fill="none" stroke="{color}" stroke-width="1.8" '
                     f'points="{coords}"><title>{esc(name)}</title></polyline>')
        if len(pts) == 1:
            x, y = pts[0]
            parts.append(f'<circle cx="{px(x):.1f}" cy="{py(y):.1f}" r="3" fill="{color}"/>')
    parts += _legend(list(clean), left + plot_w + 12, top + 10)
    parts.append("</svg>")
    return "".join(parts)


def bar_chart(categories: Sequence[str], series: Mapping[str, Sequence[float | None]],
              title: str, y_label: str = "", y_max: float = 1.0, width: int | None = None,
              height: int = 300) -> str:
    """Grouped bars: one group per category, one bar per series. None draws no bar (and says
    "n/a" under the group's bar position), so a missing value never looks like zero."""
    names = list(series)
    group_w = max(24, 14 * len(names) + 10)
    left, right, top, bottom = 56, 170, 28, 64
    width = width or max(360, left + right + group_w * max(len(categories), 1))
    plot_w, plot_h = width - left - right, height - top - bottom
    group_w = plot_w / max(len(categories), 1)
    bar_w = (group_w - 8) / max(len(names), 1)
    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" class="figure" width="{width}" '
             f'height="{height}" viewBox="0 0 {width} {height}" role="img">',
             f'<title>{esc(title)}</title>',
             f'<text x="{left}" y="18" font-size="13" font-weight="bold" {FONT}>{esc(title)}</text>',
             f'<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" '
             'stroke="#999"/>']
    for t in _nice_ticks(0.0, y_max):
        y = top + plot_h - t / y_max * plot_h
        parts.append(f'<line x1="{left}" x2="{left + plot_w}" y1="{y:.1f}" y2="{y:.1f}" '
                     f'stroke="#eee"/><text x="{left - 6}" y="{y + 4:.1f}" font-size="10" '
                     f'text-anchor="end" {FONT}>{_fmt(t)}</text>')
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
    parts += _legend(names, left + plot_w + 12, top + 10)
    parts.append("</svg>")
    return "".join(parts)


def tree_svg(tree: Tree, title: str = "") -> str:
    """A tree drawn top-down: words on the bottom row, each node centred over its children."""
    level_h, word_gap, top = 38, 12, 24 if title else 8
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
    # Words left to right, each as wide as its text; keyed by (owning node, child index).
    word_x: dict[tuple[int, int], float] = {}
    cursor = 8.0
    reading = _reading_order(tree)
    for owner, k, word in reading:
        w = 7.0 * len(word) + word_gap
        word_x[(id(owner), k)] = cursor + w / 2
        cursor += w
    word_y = top + (max(depth.values()) + 1) * level_h + 10
    # A node's x is the mean of its children's x (post-order: children first).
    x_of: dict[int, float] = {}
    for node in reversed(order):
        xs = [x_of[id(c)] if isinstance(c, Tree) else word_x[(id(node), k)]
              for k, c in enumerate(node.children)]
        x_of[id(node)] = sum(xs) / len(xs) if xs else cursor
    width, height = int(cursor + 28), int(word_y + 14)  # room for a label over the last word
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
        parts.append(f'<text class="label" x="{x:.1f}" y="{y:.1f}" font-size="12" '
                     f'text-anchor="middle" fill="#0072B2" {FONT}>{esc(node.label)}</text>')
    for owner, k, word in reading:
        parts.append(f'<text class="word" x="{word_x[(id(owner), k)]:.1f}" y="{word_y:.1f}" '
                     f'font-size="12" text-anchor="middle" {FONT}>{esc(word)}</text>')
    parts.append("</svg>")
    return "".join(parts)


def _reading_order(tree: Tree) -> list[tuple[Tree, int, str]]:
    """(owning node, child index, word) for every word, left to right (iteratively)."""
    out = []
    stack: list[tuple[Tree, int]] = [(tree, 0)]
    while stack:
        node, k = stack.pop()
        if k == len(node.children):
            continue
        stack.append((node, k + 1))
        child = node.children[k]
        if isinstance(child, str):
            out.append((node, k, child))
        else:
            stack.append((child, 0))
    return out


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
