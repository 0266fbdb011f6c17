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
from typing import Callable, Sequence

import torch
import yaml

from treewright.budget import DEFAULT_BUDGET_MB, longest_within
from treewright.corpus import (BIN_MARK, PARENT_SEP, UNARY_SEP, ReadOptions, Sentence,
                               read_corpus, read_records, run_read_options)
from treewright.errors import InputError
from treewright.report.svg import bar_chart, esc, line_chart, span_heatmap, tree_svg
from treewright.runfolder import CONFIG, GRAMMAR, METRICS, RunFolder
from treewright.tracking import perplexity
from treewright.trees import Tree, tree_from_spans

# Readable names of the metrics drawn (the keys that train/ and refine/ write to metrics.jsonl).
# A key missing here is still named in words by `metric_name`, never shown raw.
METRIC_NAMES = {
    "train/loglik_per_word": "training sentences",
    "train/elbo_per_word": "training sentences (ELBO)",
    "train/perplexity": "training sentences",
    "dev/loglik_per_word": "dev sentences",
    "dev/perplexity": "dev sentences",
    "heldout/loglik_per_word": "held-out sentences",
    "dev/sentence_f1": "sentence F1 (mean over sentences)",
    "dev/corpus_f1": "corpus F1 (brackets pooled)",
    "heldout/labeled_f1": "labelled F1",
    "heldout/labeled_precision": "labelled precision",
    "heldout/labeled_recall": "labelled recall",
    "fine_symbols": "symbols (subcategories)",
    "baseline/unigram_dev_loglik_per_word": "unigram model on dev",
    "baseline/dev_left_branching_sentence_f1": "left-branching, sentence F1",
    "baseline/dev_right_branching_sentence_f1": "right-branching, sentence F1",
    "baseline/dev_random_binary_sentence_f1": "random binary trees, sentence F1",
}
_WORDS = {"train": "training", "dev": "dev", "heldout": "held-out", "baseline": "baseline",
          "loglik": "log-likelihood", "f1": "F1", "elbo": "ELBO", "per": "per"}


def metric_name(key: str) -> str:
    """The words a chart legend shows for a metrics.jsonl key."""
    if key in METRIC_NAMES:
        return METRIC_NAMES[key]
    words = key.replace("/", " ").replace("_", " ").split()
    return " ".join(_WORDS.get(w, w) for w in words)


def _before_training(key: str) -> str:
    """`init/dev_X` (the dev score of the starting grammar, logged at step 0) -> `dev/X`, so that
    it starts the dev curve instead of standing apart."""
    rest = key[len("init/"):]
    return "dev/" + rest[len("dev_"):] if rest.startswith("dev_") else key


@dataclass(frozen=True)
class Curve:
    """One chart of the curves section: which keys are series and which are baselines."""
    title: str
    y_label: str
    series: Callable[[str], bool]
    baseline: Callable[[str], bool] = lambda key: False
    transform: Callable[[float], float] = lambda value: value   # baseline value -> chart value
    missing: str = ""      # why a run may lack this chart (shown instead of it)
    from_zero: bool = False  # the y axis starts at 0 (proportions)
    log: bool = False        # a logarithmic y axis (values that fall by orders of magnitude)


def _perplexity_of(loglik_per_word: float) -> float:
    """Perplexity is exp(-log-likelihood per word), as the trainer logs it (common practice)."""
    return perplexity(loglik_per_word)


TRAIN_CURVES = (
    Curve("Log-likelihood per word", "nats per word",
          lambda k: k.endswith(("/loglik_per_word", "/elbo_per_word")),
          lambda k: k.endswith("loglik_per_word")),
    Curve("Perplexity", "perplexity", lambda k: k.endswith("/perplexity"),
          lambda k: k.endswith("loglik_per_word"), _perplexity_of, log=True),
    Curve("Dev bracket F1", "F1", lambda k: k.startswith("dev/") and k.endswith("_f1"),
          lambda k: k.endswith("_f1"),
          missing="the run has no dev trees (data.dev with bracketed trees or CoNLL-U)",
          from_zero=True),
)
REFINE_CURVES = (
    Curve("Log-likelihood per word", "nats per word", lambda k: k.endswith("/loglik_per_word")),
    Curve("Held-out labelled F1", "F1", lambda k: k.startswith("heldout/labeled_"),
          missing="it is measured on held-out trees: a refine run from raw text has none, "
                  "and output.parse_f1 must be on", from_zero=True),
    Curve("Symbols after each cycle", "symbols", lambda k: k == "fine_symbols"),
)

STYLE = """
body { font-family: sans-serif; margin: 24px auto; max-width: 1320px; padding: 0 16px;
       color: #222; }
h1 { font-size: 22px; } h2 { font-size: 18px; border-bottom: 1px solid #ccc; margin-top: 32px; }
.missing { color: #a33; font-style: italic; }
.figures { display: flex; flex-wrap: wrap; gap: 16px; align-items: flex-start; }
.headline { font-size: 16px; }
.example .name { font-weight: bold; } .example .source { color: #666; font-size: 13px; }
.facts { font-weight: normal; color: #555; margin-left: 8px; }
.pair { display: flex; flex-wrap: wrap; gap: 24px; align-items: flex-start;
        border-top: 1px dashed #ddd; padding-top: 8px; overflow-x: auto; }
table { border-collapse: collapse; font-size: 13px; margin: 8px 0; }
td, th { border: 1px solid #ddd; padding: 3px 8px; text-align: left; vertical-align: top; }
.num { text-align: right; font-variant-numeric: tabular-nums; }
.symbols { display: flex; flex-wrap: wrap; gap: 12px; }
.binarized summary { cursor: pointer; margin: 6px 0; }
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
    return run_read_options(config.get("data"), nonprojective="lift")


def gather(run_dir: str | Path, gold: str | Path | None = None, text: str | Path | None = None,
           grammar_path: str | Path | None = None, gold_format: str = "auto") -> ReportInputs:
    """Read everything the report can use from a run folder and the optional files."""
    from treewright.export.source import check_run_room
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
    too_large = None
    if grammar_path is None:
        # The run's own grammar, too large to load as a rule tensor (a factored run of
        # thousands of symbols): the report goes on without the sections that need it.
        try:
            check_run_room(found.config, grammar_file)
        except InputError as err:
            too_large = err.reason
    if too_large is not None and grammar_file.exists():
        found.missing.append(f"{grammar_file.name} (the trained grammar: rules, parses, heat "
                             f"map), not loaded: {too_large}")
    elif grammar_file.exists():
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
        # One sentence per non-blank line, tree or CoNLL-U block, as `score` and `parse` read.
        found.text = read_records(text, options=options)
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
    pieced: bool = False      # decoded under the word-piece constraint
    freed: list[Sentence] = field(default_factory=list)  # left no tree by it: decoded without


def parse_sentences(grammar, sentences: Sequence[Sentence], decoder: str,
                    memory_budget_mb: float | None = DEFAULT_BUDGET_MB,
                    piece_side: str | None = None) -> Parsed:
    """The sentences' trees by `decoder`; `grammar` is a list of grammars for a decoder of
    several (`decode.ENSEMBLE_DECODERS`). With `piece_side` ("first" or "last"), under the
    word-piece constraint, as `parse` decodes a CoNLL-U file for a run that held it to its
    end (the sentences' joins as the run's reader read them, `word_pieces.piece_joins`);
    `Parsed.freed` lists the sentences it left no tree, decoded without it."""
    from treewright.budget import consensus_within_budget, decode_within_budget
    from treewright.decode import ENSEMBLE_DECODERS, is_treebank_grammar, treebank_tree
    from treewright.tracking import terminal_progress
    from treewright.word_pieces import sentence_barred

    tokens = [s.tokens for s in sentences]
    pieces = None
    if piece_side is not None:
        barred = [sentence_barred(s) for s in sentences]
        pieces = (piece_side, barred) if any(barred) else None
    freed: list[int] = []
    with terminal_progress(len(sentences), "report: parsing") as progress:
        if decoder in ENSEMBLE_DECODERS:
            results = consensus_within_budget(grammar, tokens, memory_budget_mb,
                                              progress=progress, pieces=pieces, freed=freed)
        else:
            results = decode_within_budget(grammar, tokens, decoder, memory_budget_mb,
                                           progress=progress, pieces=pieces, freed=freed,
                                           tree_logprobs=False)
    treebank = is_treebank_grammar(grammar if decoder in ENSEMBLE_DECODERS else [grammar])
    trees, unparsed = [], 0
    for s, r in zip(sentences, results):
        if r is None or r.tree is None:
            unparsed += 1
            trees.append(_flat(s.words))
        else:
            # The treebank's brackets, not the CNF transform's (as `parse` writes them).
            trees.append(treebank_tree(_with_words(r.tree, s.words), treebank))
    over = [s for s, r in zip(sentences, results) if r is None]
    return Parsed(list(sentences), trees, unparsed, over, pieces is not None,
                  [sentences[k] for k in sorted(freed)])


def _section(ident: str, title: str, body: str) -> str:
    return f'<section id="{ident}"><h2>{esc(title)}</h2>{body}</section>'


def _missing(text: str) -> str:
    return f'<p class="missing">{esc(text)}</p>'


def is_refine_run(config: dict, metrics: Sequence[dict]) -> bool:
    """A split-merge run: its config has a refine section, or its records count cycles."""
    return "refine" in config or any("cycle" in record for record in metrics)


def curves_section(metrics: list[dict], refine: bool = False) -> str:
    """One line chart per entry of TRAIN_CURVES (or REFINE_CURVES), with readable legends,
    integer steps or cycles, and each chart's baselines as labelled horizontal lines."""
    if not metrics:
        return _section("curves", "Training curves", _missing(f"No {METRICS} records yet."))
    curves, x_label = (REFINE_CURVES, "split-merge cycle") if refine else \
        (TRAIN_CURVES, "update step")
    restarts = {r.get("restart") for r in metrics if r.get("restart") is not None}
    figures = []
    known = list(METRIC_NAMES)
    for curve in curves:
        points: dict[tuple[str, object], list[tuple[float, float]]] = {}   # (key, restart)
        baselines: dict[str, float] = {}
        for record in metrics:
            step = _number(record.get("step"))
            restart = record.get("restart") if len(restarts) > 1 else None
            for key, value in record.items():
                y = _number(value)
                if key in ("step", "time", "restart") or y is None:
                    continue
                if key.startswith("baseline/"):
                    if curve.baseline(key) and math.isfinite(y):
                        baselines[metric_name(key)] = curve.transform(y)
                    continue
                key = _before_training(key) if key.startswith("init/") else key
                if step is not None and curve.series(key):
                    points.setdefault((key, restart), []).append((step, y))
        # Legends list the series in METRIC_NAMES order (training before dev), then by restart.
        order = sorted(points, key=lambda kr: (known.index(kr[0]) if kr[0] in known
                                               else len(known), kr[0], str(kr[1])))
        series = {metric_name(key) + ("" if restart is None else f", restart {restart}"):
                  points[(key, restart)] for key, restart in order}
        if series or baselines:
            figures.append(line_chart(series, curve.title, x_label, curve.y_label,
                                      baselines=list(baselines.items()),
                                      y_from_zero=curve.from_zero, log_y=curve.log))
        else:
            why = f" ({curve.missing})" if curve.missing else ""
            figures.append(_missing(f"{curve.title}: not in {METRICS}{why}."))
    title = "Split-merge cycles" if refine else "Training curves"
    return _section("curves", title, f'<div class="figures">{"".join(figures)}</div>')


def refine_summary(metrics: Sequence[dict], config: dict) -> str:
    """The held-out labelled F1 of a refine run's last measured cycle, in one sentence."""
    measured = [r for r in metrics if _number(r.get("heldout/labeled_f1")) is not None]
    if not measured:
        if (config.get("data") or {}).get("start") == "text":
            why = ("this run refined a grammar on raw text (data.start: text), so it had no "
                   "held-out trees to parse")
        else:
            why = ("a refine run measures it on held-out trees (data.start: treebank) with "
                   "output.parse_f1 on")
        return f"<p class='missing'>No held-out labelled F1 in {METRICS}: {esc(why)}.</p>"
    last = measured[-1]
    output = config.get("output") or {}
    decoder = output.get("f1_decoder")
    cap = output.get("f1_max_sentences")
    scores = ", ".join(f"{label} {_pct(_number(last.get(f'heldout/labeled_{key}')))}"
                       for key, label in (("precision", "precision"), ("recall", "recall"))
                       if _number(last.get(f"heldout/labeled_{key}")) is not None)
    on = "held-out trees" + (f" (at most {cap}, output.f1_max_sentences)" if cap else "")
    how = f", decoded with {decoder}" if decoder else ""
    return (f"<p class='headline'>Held-out labelled F1 after cycle {esc(last.get('cycle', '?'))}:"
            f" <b>{_pct(_number(last['heldout/labeled_f1']))}</b>"
            f"{esc(f' ({scores})' if scores else '')} on the {esc(on)}{esc(how)}.</p>")


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


def expected_uses(grammar) -> torch.Tensor | None:
    """(S,) the expected number of times each symbol occurs in a tree the grammar generates.

    nt = len(grammar.nonterminals)
    (the sum of p(a -> b c) + p(a -> c b) over c), the counts n satisfy n = r + n M over the
    nonterminals (Booth & Thompson 1973, "Applying Probability Measures to Abstract Languages":
    the expected counts of a consistent PCFG are r (I - M)^-1). Preterminals are counted from
    their parents. None when the grammar is not consistent (the series diverges).
    """
    nt = len(grammar.nonterminals)
    binary = grammar.binary.double().exp()                       # (NT, S, S)
    children = binary.sum(2) + binary.sum(1)                     # (NT, S)
    root = grammar.root.double().exp()                           # (NT,)
    try:
        counts_nt = torch.linalg.solve((torch.eye(nt, dtype=torch.float64)
                                        - children[:, :nt]).T, root)  # (NT,)
    except RuntimeError:
        return None
    if not bool(torch.isfinite(counts_nt).all()) or float(counts_nt.min()) < -1e-9 or \
            float(torch.linalg.eigvals(children[:, :nt]).abs().max()) >= 1.0:
        return None
    counts_nt = counts_nt.clamp_min(0.0)
    return torch.cat([counts_nt, counts_nt @ children[:, nt:]])  # (S,)


def _small(value: float, decimals: int) -> str:
    """`value` with `decimals` decimals, or with one significant digit when that would print a
    nonzero value as zero ("root 0.000" would say the symbol never starts a tree)."""
    if value == 0 or abs(value) >= 0.5 * 10 ** -decimals:
        return f"{value:.{decimals}f}"
    return f"{value:.0e}"


def binarization_parent(symbol: str) -> str | None:
    """The phrase label an intermediate symbol of the binarization belongs to (`¤VP¤NP·1` ->
    `VP`; `corpus.transforms.binarize` names them so), else None."""
    from treewright.grammar import coarse_name

    name = coarse_name(symbol)
    if not name.startswith(BIN_MARK):
        return None
    for mark in (BIN_MARK, PARENT_SEP, UNARY_SEP):
        name = name[:1] + name[1:].split(mark, 1)[0]
    return name[1:] or None


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
    uses = expected_uses(grammar)
    weight = uses if uses is not None else torch.cat([root, torch.zeros(S - nt, dtype=root.dtype)])
    order = sorted(range(nt), key=lambda a: -float(weight[a])) + \
        sorted(range(nt, S), key=lambda a: -float(weight[a]))

    def card(a: int) -> str:
        entries = []
        if a < nt:
            values, index = binary[a].topk(min(top, binary.shape[1]))
            entries += [(float(v), f"{names[int(k) // S]} {names[int(k) % S]}")
                        for v, k in zip(values, index) if v > 0]
        values, index = lexical[a].topk(min(top, lexical.shape[1]))
        entries += [(float(v), f"\u201c{words[int(k)]}\u201d") for v, k in zip(values, index)
                    if v > 0]
        entries = sorted(entries, key=lambda e: -e[0])[:top]
        facts = []
        if uses is not None:
            facts.append(f"{_small(float(uses[a]), 2)} per tree")
        if a < nt and float(root[a]) > 0:
            facts.append(f"root {_small(float(root[a]), 3)}")
        rows = "".join(f"<tr><td>{esc(rhs)}</td><td class='num'>{p:.3f}</td></tr>"
                       for p, rhs in entries)
        return (f"<table class='symbol'><tr><th colspan='2'>{esc(names[a])}"
                f"<span class='facts'>{esc(', '.join(facts))}</span></th></tr>{rows}</table>")

    # Intermediate symbols of a treebank's binarization (¤VP¤NP·1, refined treebank grammars)
    # are parts of their parent's rules, as the drawn trees show them: grouped under it.
    groups: dict[str, list[int]] = {}
    cards = []
    for a in order:
        parent = binarization_parent(names[a])
        if parent is None:
            cards.append(card(a))
        else:
            groups.setdefault(parent, []).append(a)
    by = ("expected uses per tree" if uses is not None
          else "root probability (expected uses diverge: the grammar is not consistent)")
    shown = S - sum(map(len, groups.values()))
    body = (f"<p>{nt} nonterminals, then {S - nt} preterminals, each by {by}; "
            f"{len(words)} words; each symbol's {top} most probable rules. \u201croot p\u201d "
            "is the probability that a tree starts with the symbol.</p>"
            f'<div class="symbols">{"".join(cards)}</div>')
    if groups:
        body += (f"<p>The other {S - shown} symbols are the intermediate steps (\u00a4\u2026) "
                 "by which the treebank's phrases of more than two children were binarized; "
                 "they are grouped under the phrase they belong to.</p>")
        body += "".join(f"<details class='binarized'><summary>{esc(parent)}: "
                        f"{len(members)} intermediate symbols</summary>"
                        f'<div class="symbols">{"".join(card(a) for a in members)}</div>'
                        "</details>" for parent, members in groups.items())
    return _section("grammar", "Symbols: most probable rules and words", body)


def lexical_section(lexical) -> str:
    """What a lexicalized model learned about words (an `export.lexical.LexicalSummary`), or a
    sentence saying why it is missing (`lexical` a str)."""
    from treewright.export.lexical import BACKOFF_NOTE, HEAD_SYMBOLS_NOTE, WORD_PAIRS_NOTE

    title = "Head words: back-off and strongest pairs"
    if isinstance(lexical, str):
        return _section("lexical", title, _missing(lexical))

    def table(caption: str, heads: tuple[str, ...], rows: list[tuple]) -> str:
        head = "".join(f"<th>{esc(h)}</th>" for h in heads)
        body = "".join("<tr>" + "".join(
            f"<td class='num'>{v:.3f}</td>" if isinstance(v, float) else f"<td>{esc(v)}</td>"
            for v in row) + "</tr>" for row in rows)
        return (f"<table class='lexical'><caption>{esc(caption)}</caption><tr>{head}</tr>"
                f"{body}</table>")

    body = ("<p>The lexicalized model (Yang, Zhao &amp; Tu 2021) gives every constituent a head "
            "word. Its grammar above is the symbol-only back-off; these tables are what the "
            f"word-conditioned rules add. Back-off: {esc(BACKOFF_NOTE)}. Word pairs: "
            f"{esc(WORD_PAIRS_NOTE)}. Head-symbol pairs: {esc(HEAD_SYMBOLS_NOTE)}.</p>"
            '<div class="figures">'
            + table("back-off weight per nonterminal", ("symbol", "lambda"), lexical.backoff)
            + table("strongest head-dependent word pairs", ("head", "dependent", "score"),
                    lexical.word_pairs)
            + table("strongest head-symbol pairs", ("symbol", "head word", "score"),
                    lexical.head_symbols)
            + "</div>")
    return _section("lexical", title, body)


def sentence_name(sentence: Sentence) -> str:
    """What a reader calls the sentence: its id where the source names it (CoNLL-U
    `# sent_id`), else its line."""
    return sentence.sent_id if sentence.sent_id else f"line {sentence.line}"


def _where(sentence: Sentence) -> str:
    """The sentence's name, and its file and line for finding it."""
    source = Path(sentence.source).name if sentence.source else "?"
    return (f"<span class='name'>{esc(sentence_name(sentence))}</span> "
            f"<span class='source'>{esc(source)}, line {sentence.line}</span>")


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
        pairs.append(f'<div class="pair"><p class="example">{_where(parsed.sentences[k])}</p>'
                     f'{"".join(figures)}</div>')
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
    caption = (f"<p class='example'>{_where(s)}</p><p>The cell in column i, row w is the "
               "posterior probability that words i..i+w-1 form a constituent.</p>")
    return _section("heatmap", title, caption + figure)


def choose_decoder(grammar, asked: str | None, restarts: int = 0) -> tuple[str, str]:
    """The decoder for the report's trees and a sentence saying why it was chosen.

    A refined grammar's symbols are subcategories (`NP·1`) of coarse symbols: its trees are read
    with max-rule-product, which sums over the subcategories (Petrov & Klein 2007, "Improved
    Inference for Unlexicalized Parsing"). A run that saved `restarts` >= 2 restart grammars is
    read with consensus, tree averaging of their mbr trees (Shayegh et al. 2024), which beat the
    restart kept by likelihood on the induction benchmark. Any other grammar is read with mbr,
    the tree of largest expected bracket recall (Goodman 1996, "Parsing Algorithms and
    Metrics").
    """
    from treewright.decode import coarse_name

    if asked is not None:
        return asked, f"trees decoded with {asked} (as asked)."
    if grammar is None:
        return "mbr", "no grammar, so no trees decoded."
    fine = grammar.symbols
    coarse = {coarse_name(s) for s in fine}
    if any(coarse_name(s) != s for s in fine):
        return "max-rule-product", (
            f"trees decoded with max-rule-product, the decoder for refined grammars: its "
            f"{len(fine)} symbols are subcategories of {len(coarse)} coarse symbols, and the "
            "trees show the coarse ones.")
    if restarts >= 2:
        return "consensus", (
            f"trees decoded with consensus over the run's {restarts} restarts: each restart's "
            "mbr tree votes, and the tree with the largest summed F1 against them is shown.")
    return "mbr", ("trees decoded with mbr (the binary tree of largest expected bracket recall), "
                   "the decoder for grammars that are not refined.")


def build_report(run_dir: str | Path, gold: str | Path | None = None,
                 text: str | Path | None = None, *, grammar_path: str | Path | None = None,
                 decoder: str | None = None, examples: int = 3, max_example_words: int = 20,
                 heatmap_sentence: int = 1, top_rules: int = 6, gold_format: str = "auto",
                 max_sentences: int | None = None,
                 memory_budget_mb: float | None = DEFAULT_BUDGET_MB, lexical=None) -> str:
    """The HTML page (a string) for the run in `run_dir`.

    gold: bracketed trees or CoNLL-U, parsed with the run's grammar for F1 by length, label
        recall and the example trees (default: the run's dev corpus when it has trees).
    text: raw sentences for examples and the heat map when there is no gold.
    decoder: see `treewright.decode.DECODERS`; None (the default) picks by the grammar:
        max-rule-product for a refined grammar, consensus for a run with two or more saved
        restarts, else mbr (`choose_decoder`; the page says which).
        "consensus" (`decode.ENSEMBLE_DECODERS`) decodes with every restart grammar the run
        saved, or that the run folder `grammar_path` saved (`export.open_restart_grammars`).
    max_sentences: parse only the first N gold sentences (the page says how many of how many).
    heatmap_sentence: 1-based index into the gold (else text) sentences.
    memory_budget_mb: sentences that alone need more are not parsed; the page names them.
    lexical: for a lexicalized run, what its model learned about words
        (`induce.lexical_summary_of`, an `export.lexical.LexicalSummary`), shown after the
        symbols; a str says why it is missing; None (another model): no such section.
    """
    from treewright.decode import ENSEMBLE_DECODERS
    from treewright.export.source import (open_restart_grammars, read_training_record,
                                          saved_restarts)
    from treewright.word_pieces import held_at_end

    found = gather(run_dir, gold, text, grammar_path, gold_format)
    grammar_folder = grammar_path if grammar_path is not None else run_dir
    asked = decoder
    decoder, decoded_with = choose_decoder(found.grammar, decoder,
                                           saved_restarts(grammar_folder))
    decoding = found.grammar
    if decoder in ENSEMBLE_DECODERS and found.grammar is not None:
        decoding = [s.grammar for s in open_restart_grammars(grammar_folder,
                                                             f"the {decoder} decoder")]
        if asked is not None:
            decoded_with = (f"trees decoded with {decoder} (as asked), over the run's "
                            f"{len(decoding)} restarts.")
    refine = is_refine_run(found.config, found.metrics)
    pool = found.gold if found.gold is not None else found.text
    parsed, reason = None, "Needs the grammar and --gold or --text."
    if found.grammar is not None and pool:
        chosen = pool if max_sentences is None else pool[:max_sentences]
        if len(chosen) < len(pool):
            found.notes.append(f"parsed the first {len(chosen)} of {len(pool)} sentences "
                               "(max_sentences)")
        side = held_at_end(read_training_record(Path(grammar_folder))) \
            if Path(grammar_folder).is_dir() else None
        parsed = parse_sentences(decoding, chosen, decoder, memory_budget_mb, side)
        if parsed.pieced:
            found.notes.append(
                f"decoded under the word-piece constraint the run held to its end (the host "
                f"comes {side}), as treewright parse decodes CoNLL-U")
        if parsed.freed:
            found.notes.append(
                f"{len(parsed.freed)} sentences had no tree that keeps every piece of their "
                f"split written words with the host and were decoded without the constraint "
                f"(first: {parsed.freed[0].source}, line {parsed.freed[0].line})")
        if parsed.over_budget:
            found.notes.append(
                f"{len(parsed.over_budget)} sentences over the memory budget of "
                f"{memory_budget_mb:g} MB were not parsed (shown flat; first: "
                f"{parsed.over_budget[0].source}, line {parsed.over_budget[0].line})")
    with_gold = found.gold is not None
    sections = [
        curves_section(found.metrics, refine),
        evaluation_section(parsed if with_gold else None,
                           "Needs the grammar and gold trees (--gold)."),
        grammar_section(found.grammar, top_rules),
        *([] if lexical is None else [lexical_section(lexical)]),
        examples_section(parsed, with_gold, examples, max_example_words, reason),
        heatmap_section(found.grammar, pool, heatmap_sentence, memory_budget_mb),
    ]
    kind = "split-merge refinement" if refine else "training run"
    header = [f"<h1>treewright {kind}: {esc(found.run_dir.name)}</h1>",
              f"<p>Folder {esc(found.run_dir)}; {esc(decoded_with)}</p>"]
    if refine:
        header.append(refine_summary(found.metrics, found.config))
    if found.missing:
        header.append("<p class='missing'>Missing: " + esc("; ".join(found.missing)) + "</p>")
    if found.notes:
        header.append("<ul class='notes'>" + "".join(f"<li>{esc(n)}</li>" for n in found.notes)
                      + "</ul>")
    nav = "".join(f'<a href="#{i}">{t}</a> ' for i, t in (
        ("curves", "curves"), ("evaluation", "evaluation"), ("grammar", "symbols"),
        *([] if lexical is None else [("lexical", "head words")]),
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
