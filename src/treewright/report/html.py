"""One self-contained HTML page about a training run.

`build_report(run_dir, ...)` reads what the run folder holds (config.yaml, metrics.jsonl,
grammar.pcfg) and, given gold trees or raw text, parses example sentences with the run's
grammar. Every figure is inline SVG drawn by `report.svg`; the page loads nothing from the
network and runs no script. A missing piece (no metrics yet, no grammar, no gold) leaves its
section in place with a sentence saying what is missing, so a report of a run in progress or of
a damaged folder still opens.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import torch
import yaml

from treewright.budget import DEFAULT_BUDGET_MB, longest_within
from treewright.corpus import ReadOptions, Sentence, read_corpus, run_case_rules
from treewright.errors import InputError
from treewright.report.svg import bar_chart, esc, line_chart, span_heatmap, tree_svg
from treewright.runfolder import CONFIG, GRAMMAR, METRICS, RunFolder
from treewright.trees import Tree, tree_from_spans

# Metric groups drawn as curves: (figure title, y label, test on the metric name).
CURVES = (
    ("Log-likelihood per word", "nats per word",
     lambda k: k.endswith("loglik_per_word") or k.endswith("elbo_per_word")),
    ("Perplexity", "perplexity", lambda k: k.endswith("perplexity")),
    ("Dev bracket F1", "F1", lambda k: k.startswith("dev/") and k.endswith("_f1")),
)

STYLE = """
body { font-family: sans-serif; margin: 24px auto; max-width: 1200px; color: #222; }
h1 { font-size: 22px; } h2 { font-size: 18px; border-bottom: 1px solid #ccc; margin-top: 32px; }
.missing { color: #a33; font-style: italic; }
.figures { display: flex; flex-wrap: wrap; gap: 16px; }
.pair { display: flex; flex-wrap: wrap; gap: 24px; align-items: flex-start;
        border-top: 1px dashed #ddd; padding-top: 8px; overflow-x: auto; }
table { border-collapse: collapse; font-size: 13px; margin: 8px 0; }
td, th { border: 1px solid #ddd; padding: 3px 8px; text-align: left; vertical-align: top; }
.num { text-align: right; font-variant-numeric: tabular-nums; }
.symbols { display: flex; flex-wrap: wrap; gap: 12px; }
pre { background: #f6f6f6; padding: 8px; overflow-x: auto; font-size: 12px; }
"""


@dataclass
class ReportInputs:
    """What the report found; `missing` lists, in words, what it could not use."""
    run_dir: Path
    config_text: str | None = None
    config: dict = field(default_factory=dict)
    metrics: list[dict] = field(default_factory=list)
    grammar: object | None = None
    gold: list[Sentence] | None = None
    text: list[Sentence] | None = None
    missing: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def read_metrics(path: Path) -> tuple[list[dict], list[int]]:
    """Records of a metrics.jsonl file and the line numbers that were not JSON objects (a run
    killed while writing leaves a partial last line)."""
    records, bad = [], []
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            bad.append(number)
            continue
        if isinstance(record, dict):
            records.append(record)
        else:
            bad.append(number)
    return records, bad


def _number(value) -> float | None:
    """A metric value as a float: JSON numbers, and the strings "nan"/"inf" the logger writes."""
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        try:
            return float(value)
        except ValueError:
            return None
    return None


def _read_options(config: dict) -> ReadOptions:
    """Token options of the run's data section, so gold/text tokens match the grammar's words."""
    data = config.get("data") or {}
    rules = run_case_rules(data)
    return ReadOptions(lowercase=rules is not None, case_rules=rules or "default",
                       tag_mode=bool(data.get("tag_mode", False)), nonprojective="lift")


def gather(run_dir: str | Path, gold: str | Path | None = None, text: str | Path | None = None,
           grammar_path: str | Path | None = None, gold_format: str = "auto") -> ReportInputs:
    """Read everything the report can use from a run folder and the optional files."""
    from treewright.export.source import load as load_grammar  # text, JSON export or run folder

    run = Path(run_dir)
    if not run.is_dir():
        raise InputError("no such run folder", path=str(run))
    found = ReportInputs(run)
    config_path = run / CONFIG
    if config_path.exists():
        found.config_text = config_path.read_text(encoding="utf-8")
        try:
            loaded = yaml.safe_load(found.config_text)
            found.config = loaded if isinstance(loaded, dict) else {}
        except yaml.YAMLError as err:
            found.notes.append(f"{CONFIG} is not valid YAML ({err.__class__.__name__}); shown as text")
    else:
        found.missing.append(f"{CONFIG} (the run's configuration)")
    metrics_path = run / METRICS
    if metrics_path.exists():
        found.metrics, bad = read_metrics(metrics_path)
        if bad:
            found.notes.append(f"{METRICS}: {len(bad)} lines were not JSON objects and are not "
                               f"drawn (first: line {bad[0]})")
    else:
        found.missing.append(f"{METRICS} (training curves)")
    grammar_file = Path(grammar_path) if grammar_path is not None else run / GRAMMAR
    if grammar_file.exists():
        found.grammar = load_grammar(grammar_file)
    else:
        finished = sorted(p.name for p in run.glob("restart-*.pcfg"))
        hint = f"; finished restarts can be shown with --grammar: {', '.join(finished)}" \
            if finished else ""
        found.missing.append(f"{grammar_file.name} (the trained grammar: rules, parses, heat "
                             f"map){hint}")
    options = _read_options(found.config)
    if gold is None:
        dev = (found.config.get("data") or {}).get("dev")
        if dev and Path(dev).exists():
            candidate = read_corpus(dev, "auto", options)
            if all(s.tree is not None for s in candidate.sentences):
                found.gold = candidate.sentences
                found.notes.append(f"gold trees: the run's dev corpus {dev}")
    else:
        found.gold = read_corpus(gold, gold_format, options).sentences
        if any(s.tree is None for s in found.gold):
            raise InputError("gold file has no trees (give bracketed trees or CoNLL-U)",
                             path=str(gold))
    if text is not None:
        found.text = read_corpus(text, "text", options).sentences
    if found.gold is None:
        found.missing.append("gold trees (--gold): F1 by length, label recall, gold trees")
    return found


def _with_words(tree: Tree, words: Sequence[str]) -> Tree:
    """The same brackets over other words of the same length (tokens -> surface words)."""
    return tree_from_spans(list(words), tree.labeled_spans())


def _flat(words: Sequence[str]) -> Tree:
    return Tree("NOPARSE", list(words))


@dataclass
class Parsed:
    sentences: list[Sentence]
    trees: list[Tree]        # one per sentence; NOPARSE for sentences without a parse
    unparsed: int
    over_budget: list[Sentence] = field(default_factory=list)  # not parsed: over the budget


def parse_sentences(grammar, sentences: Sequence[Sentence], decoder: str,
                    memory_budget_mb: float | None = DEFAULT_BUDGET_MB) -> Parsed:
    from treewright.budget import decode_within_budget
    from treewright.tracking import terminal_progress

    with terminal_progress(len(sentences), "report: parsing") as progress:
        results = decode_within_budget(grammar, [s.tokens for s in sentences], decoder,
                                       memory_budget_mb, progress=progress)
    trees, unparsed = [], 0
    for s, r in zip(sentences, results):
        if r is None or r.tree is None:
            unparsed += 1
            trees.append(_flat(s.words))
        else:
            trees.append(_with_words(r.tree, s.words))
    over = [s for s, r in zip(sentences, results) if r is None]
    return Parsed(list(sentences), trees, unparsed, over)


def _section(ident: str, title: str, body: str) -> str:
    return f'<section id="{ident}"><h2>{esc(title)}</h2>{body}</section>'


def _missing(text: str) -> str:
    return f'<p class="missing">{esc(text)}</p>'


def curves_section(metrics: list[dict]) -> str:
    if not metrics:
        return _section("curves", "Training curves", _missing(f"No {METRICS} records yet."))
    figures = []
    for title, y_label, wanted in CURVES:
        series: dict[str, list[tuple[float, float]]] = {}
        for record in metrics:
            step = _number(record.get("step"))
            if step is None:
                continue
            restart = record.get("restart")
            for key, value in record.items():
                y = _number(value)
                if key in ("step", "time", "restart") or y is None or not wanted(key):
                    continue
                name = key if restart is None else f"{key} (restart {restart})"
                series.setdefault(name, []).append((step, y))
        if series:
            figures.append(line_chart(series, title, "step", y_label))
        else:
            figures.append(_missing(f"{title}: no such metric in {METRICS}."))
    return _section("curves", "Training curves", f'<div class="figures">{"".join(figures)}</div>')


def evaluation_section(parsed: Parsed | None, reason: str) -> str:
    from treewright.evaluation import evaluate_brackets
    from treewright.evaluation.brackets import SYSTEM_TITLES

    if parsed is None:
        return _section("evaluation", "Brackets against gold", _missing(reason))
    result = evaluate_brackets(parsed.trees, [s.tree for s in parsed.sentences])
    titles = {name: SYSTEM_TITLES.get(name, name) for name in result.systems}
    rows = "".join(
        f"<tr><td>{esc(titles[name])}</td><td class='num'>{_pct(s.sentence_f1)}</td>"
        f"<td class='num'>{_pct(s.corpus_f1)}</td><td class='num'>{_pct(s.corpus_precision)}</td>"
        f"<td class='num'>{_pct(s.corpus_recall)}</td></tr>"
        for name, s in result.systems.items())
    table = ("<table class='scores'><tr><th>system</th><th>sentence F1</th><th>corpus F1</th>"
             f"<th>corpus P</th><th>corpus R</th></tr>{rows}</table>")
    c = result.counts
    counted = (f"<p>{c['evaluated']} of {c['read']} gold sentences evaluated ({parsed.unparsed} "
               f"without a parse, scored as flat trees); {c['punctuation_words_removed']} "
               "punctuation words removed; whole-sentence spans not counted.</p>")
    buckets = [b for b in result.buckets if b.sentences]
    empty = [b.name for b in result.buckets if not b.sentences]
    figures = []
    if buckets:
        figures.append(bar_chart([f"{b.name} (n={b.sentences})" for b in buckets],
                                 {titles[name]: [b.scores[name].sentence_f1 for b in buckets]
                                  for name in result.systems},
                                 "Sentence F1 by length", "F1"))
    labels = sorted({lab for per in result.label_recall.values() for lab in per},
                    key=lambda lab: -next(iter(result.label_recall.values()))[lab].gold)
    if labels:
        figures.append(bar_chart([f"{lab} ({result.label_recall['model'][lab].gold})"
                                  for lab in labels],
                                 {titles[name]: [per[lab].recall for lab in labels]
                                  for name, per in result.label_recall.items()},
                                 "Recall of gold spans by gold label", "recall"))
    note = f"<p>Length buckets with no sentence: {esc(', '.join(empty))}.</p>" if empty else ""
    body = table + counted + f'<div class="figures">{"".join(figures)}</div>' + note
    return _section("evaluation", "Brackets against gold", body)


def _pct(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.1f}"


def grammar_section(grammar, top: int) -> str:
    if grammar is None:
        return _section("grammar", "Symbols", _missing(f"No {GRAMMAR} in the run folder."))
    names = grammar.symbols
    nt = len(grammar.nonterminals)
    words = grammar.vocab.words
    root = grammar.root.double().exp()
    binary = grammar.binary.double().exp().flatten(1)            # (NT, S*S)
    lexical = grammar.lexical.double().exp()                     # (S, V)
    S = grammar.num_symbols
    order = sorted(range(nt), key=lambda a: -float(root[a]))
    cards = []
    for a in order + list(range(nt, S)):
        entries = []
        if a < nt:
            values, index = binary[a].topk(min(top, binary.shape[1]))
            entries += [(float(v), f"{names[int(k) // S]} {names[int(k) % S]}")
                        for v, k in zip(values, index) if v > 0]
        values, index = lexical[a].topk(min(top, lexical.shape[1]))
        entries += [(float(v), f"\u201c{words[int(k)]}\u201d") for v, k in zip(values, index)
                    if v > 0]
        entries = sorted(entries, key=lambda e: -e[0])[:top]
        head = f"{names[a]}" + (f" (root {float(root[a]):.3f})" if a < nt else "")
        rows = "".join(f"<tr><td>{esc(rhs)}</td><td class='num'>{p:.3f}</td></tr>"
                       for p, rhs in entries)
        cards.append(f"<table class='symbol'><tr><th colspan='2'>{esc(head)}</th></tr>{rows}</table>")
    body = (f"<p>{nt} nonterminals (by root probability), {S - nt} preterminals, "
            f"{len(words)} words; each symbol's {top} most probable rules.</p>"
            f'<div class="symbols">{"".join(cards)}</div>')
    return _section("grammar", "Symbols: most probable rules and words", body)


def examples_section(parsed: Parsed | None, with_gold: bool, count: int, max_words: int,
                     reason: str) -> str:
    if parsed is None:
        return _section("examples", "Example sentences", _missing(reason))
    chosen = [k for k, s in enumerate(parsed.sentences) if len(s.words) <= max_words][:count]
    if not chosen:
        return _section("examples", "Example sentences",
                        _missing(f"No sentence of at most {max_words} words."))
    pairs = []
    for k in chosen:
        figures = [tree_svg(parsed.trees[k], "predicted")]
        if with_gold:
            figures.append(tree_svg(parsed.sentences[k].tree, "gold"))
        where = f"{parsed.sentences[k].source}, line {parsed.sentences[k].line}"
        pairs.append(f'<div class="pair"><p>{esc(where)}</p>{"".join(figures)}</div>')
    return _section("examples", "Example sentences", "".join(pairs))


def heatmap_section(grammar, sentences: Sequence[Sentence] | None, index: int,
                    memory_budget_mb: float | None = DEFAULT_BUDGET_MB) -> str:
    title = "Span posteriors"
    if grammar is None or not sentences:
        return _section("heatmap", title, _missing("Needs the grammar and --gold or --text."))
    if not 1 <= index <= len(sentences):
        return _section("heatmap", title, _missing(
            f"Sentence {index} asked for, but there are {len(sentences)}."))
    from treewright import engine
    from treewright.inference import encode

    s = sentences[index - 1]
    if len(s.tokens) > longest_within(grammar, memory_budget_mb, torch.float64):
        return _section("heatmap", title, _missing(
            f"Sentence {index} ({s.source}, line {s.line}) is over the memory budget of "
            f"{memory_budget_mb:g} MB."))
    enc = encode(grammar, [s.tokens], torch.float64)
    post = engine.posteriors(grammar.root.to(torch.float64), grammar.binary.to(torch.float64),
                             enc.terminal, enc.lengths, enc.nt_terminal)
    if not math.isfinite(float(post.logz[0])):
        return _section("heatmap", title, _missing(f"Sentence {index} has no parse."))
    figure = span_heatmap(post.spans[0].tolist(), s.words,
                          f"p(span | sentence), sentence {index}")
    caption = (f"<p>{esc(s.source)}, line {s.line}: the cell in column i, row w is the "
               "posterior probability that words i..i+w-1 form a constituent.</p>")
    return _section("heatmap", title, caption + figure)


def build_report(run_dir: str | Path, gold: str | Path | None = None,
                 text: str | Path | None = None, *, grammar_path: str | Path | None = None,
                 decoder: str = "mbr", examples: int = 3, max_example_words: int = 20,
                 heatmap_sentence: int = 1, top_rules: int = 6, gold_format: str = "auto",
                 max_sentences: int | None = None,
                 memory_budget_mb: float | None = DEFAULT_BUDGET_MB) -> str:
    """The HTML page (a string) for the run in `run_dir`.

    gold: bracketed trees or CoNLL-U, parsed with the run's grammar for F1 by length, label
        recall and the example trees (default: the run's dev corpus when it has trees).
    text: raw sentences for examples and the heat map when there is no gold.
    decoder: see `treewright.decode.DECODERS`. max_sentences: parse only the first N gold
        sentences (the page says how many of how many).
    heatmap_sentence: 1-based index into the gold (else text) sentences.
    memory_budget_mb: sentences that alone need more are not parsed; the page names them.
    """
    found = gather(run_dir, gold, text, grammar_path, gold_format)
    pool = found.gold if found.gold is not None else found.text
    parsed, reason = None, "Needs the grammar and --gold or --text."
    if found.grammar is not None and pool:
        chosen = pool if max_sentences is None else pool[:max_sentences]
        if len(chosen) < len(pool):
            found.notes.append(f"parsed the first {len(chosen)} of {len(pool)} sentences "
                               "(max_sentences)")
        parsed = parse_sentences(found.grammar, chosen, decoder, memory_budget_mb)
        if parsed.over_budget:
            found.notes.append(
                f"{len(parsed.over_budget)} sentences over the memory budget of "
                f"{memory_budget_mb:g} MB were not parsed (shown flat; first: "
                f"{parsed.over_budget[0].source}, line {parsed.over_budget[0].line})")
    with_gold = found.gold is not None
    sections = [
        curves_section(found.metrics),
        evaluation_section(parsed if with_gold else None,
                           "Needs the grammar and gold trees (--gold)."),
        grammar_section(found.grammar, top_rules),
        examples_section(parsed, with_gold, examples, max_example_words, reason),
        heatmap_section(found.grammar, pool, heatmap_sentence, memory_budget_mb),
    ]
    header = [f"<h1>treewright run: {esc(found.run_dir.name)}</h1>",
              f"<p>Folder {esc(found.run_dir)}; trees decoded with {esc(decoder)}.</p>"]
    if found.missing:
        header.append("<p class='missing'>Missing: " + esc("; ".join(found.missing)) + "</p>")
    if found.notes:
        header.append("<ul class='notes'>" + "".join(f"<li>{esc(n)}</li>" for n in found.notes)
                      + "</ul>")
    nav = "".join(f'<a href="#{i}">{t}</a> ' for i, t in (
        ("curves", "curves"), ("evaluation", "evaluation"), ("grammar", "symbols"),
        ("examples", "examples"), ("heatmap", "heat map"), ("config", "config")))
    config = (_missing(f"No {CONFIG}.") if found.config_text is None
              else f"<pre>{esc(found.config_text)}</pre>")
    sections.append(_section("config", "Configuration", config))
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>treewright report: {esc(found.run_dir.name)}</title>"
            f"<style>{STYLE}</style></head><body>{''.join(header)}<nav>{nav}</nav>"
            f"{''.join(sections)}</body></html>\n")


def write_report(run_dir: str | Path, out: str | Path | None = None, **options) -> Path:
    """Write `build_report(run_dir, **options)` to `out` (default run_dir/report.html)."""
    from treewright.safeio import write_output_text

    path = Path(out) if out is not None else RunFolder(run_dir).report
    write_output_text(path, build_report(run_dir, **options))  # makes a missing folder
    return path
