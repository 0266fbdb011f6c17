"""One self-contained HTML page about a segmentation run (`treewright segment`).

`build_segment_report(run_dir)` reads what the run folder holds: config.yaml, metrics.jsonl
(the log joint probability of every chain by sweep, the reported chain's acceptance rate,
cached units and, with gold, its F1), chains.json (how many analyses the segmentation pooled),
segmentation.txt and lexicon.tsv. With gold (the spaces of the input lines, or a CoNLL-U file's
tokens) it scores the written segmentation again, beside the no-split and split-every-character
baselines. Like the training report, a missing piece leaves its section with a sentence saying
what is missing, and every figure is inline SVG.
"""

from __future__ import annotations

from pathlib import Path

from treewright.errors import InputError
from treewright.export.segmentation import checkpoint_progress, read_lexicon
from treewright.report.html import STYLE, _missing, _number, _section, read_metrics
from treewright.report.svg import esc, line_chart
from treewright.runfolder import RunFolder

LEXICON_ROWS = 25     # units listed per adapted symbol
EXAMPLE_ROWS = 12     # utterances shown with their gold


def _scores_table(rows: list[tuple[str, object]], tokens: bool) -> str:
    """Precision, recall and F1 of boundaries (and tokens) per named `SegmentationScores`."""
    head = "<tr><th></th>" + ("<th>token P</th><th>R</th><th>F1</th>" if tokens else "") + \
        "<th>boundary P</th><th>R</th><th>F1</th></tr>"
    body = []
    for name, s in rows:
        parts = ([s.tokens] if tokens else []) + [s.boundaries]
        cells = "".join(f"<td class='num'>{x:.3f}</td>" for p in parts
                        for x in (p.precision, p.recall, p.f1))
        body.append(f"<tr><td>{esc(name)}</td>{cells}</tr>")
    return f"<table>{head}{''.join(body)}</table>"


def _curves(metrics: list[dict]) -> str:
    """Log joint by sweep (every chain), F1 and acceptance by sweep, cached units by sweep."""
    if not metrics:
        return _section("curves", "Sampler curves", _missing("No metrics.jsonl records yet."))

    def series(keep) -> dict[str, list[tuple[float, float]]]:
        out: dict[str, list[tuple[float, float]]] = {}
        for record in metrics:
            step = _number(record.get("step"))
            for key, value in record.items():
                y = _number(value)
                if step is not None and y is not None and keep(key):
                    out.setdefault(key.replace("_", " "), []).append((step, y))
        return out

    several = any(k.startswith("log_joint_chain") for r in metrics for k in r)
    charts = [
        ("Log joint probability (log posterior up to a constant)", "nats",
         (lambda k: k.startswith("log_joint_chain")) if several else
         (lambda k: k == "log_joint"), False),
        ("Reported chain against the gold", "F1", lambda k: k in ("token_f1", "boundary_f1"),
         True),
        ("Reported chain's acceptance rate", "share accepted", lambda k: k == "accept_rate",
         True),
        ("Cached units of the reported chain", "units", lambda k: k.startswith("cached_"),
         True),
    ]
    figures = []
    for title, y_label, keep, from_zero in charts:
        drawn = series(keep)
        figures.append(line_chart(drawn, title, "sweep", y_label, y_from_zero=from_zero)
                       if drawn else _missing(f"{title}: not in metrics.jsonl."))
    return _section("curves", "Sampler curves", f'<div class="figures">{"".join(figures)}</div>')


def _lexicon(path: Path) -> str:
    """The most used cached units of each adapted symbol, from lexicon.tsv."""
    if not path.is_file():
        return _section("lexicon", "Induced lexicon",
                        _missing("No lexicon.tsv: the run has not finished."))
    groups: dict[str, list[tuple[str, int, int]]] = {}
    for symbol, text, customers, tables in read_lexicon(path):
        groups.setdefault(symbol, []).append((text, customers, tables))
    parts = []
    for symbol, rows in groups.items():
        shown = rows[:LEXICON_ROWS]
        body = "".join(f"<tr><td>{esc(t)}</td><td class='num'>{c}</td><td class='num'>{k}</td>"
                       f"</tr>" for t, c, k in shown)
        parts.append(f"<div><p><b>{esc(symbol)}</b>: {len(rows)} cached units, the "
                     f"{len(shown)} most used</p><table><tr><th>unit</th><th>customers</th>"
                     f"<th>tables</th></tr>{body}</table></div>")
    return _section("lexicon", "Induced lexicon (the reported chain's cache)",
                    f'<div class="figures">{"".join(parts)}</div>')


def _evaluation(cfg, folder: RunFolder, written: list[list[str]] | None) -> tuple[str, str]:
    """(the scores section, the examples section) of the written segmentation."""
    from treewright.adaptor.morphs import baseline_scores, by_type, read_written_words
    from treewright.adaptor.segment import read_utterances
    from treewright.evaluation.segmentation import evaluate_segmentation

    if written is None:
        why = _missing("No segmentation.txt: the run has not finished.")
        return _section("scores", "Scores", why), _section("examples", "Examples", why)
    if not Path(cfg.data.text).is_file():
        why = _missing(f"The run's input {cfg.data.text} is not there to score against.")
        return _section("scores", "Scores", why), _section("examples", "Examples", why)
    conllu = cfg.data.format == "conllu"
    if conllu:
        words = read_written_words(cfg.data.text, cfg.data.case_rules)
        first = words.first_morphs()
        gold, inputs = list(first.values()), list(first)
    else:
        utterances = read_utterances(cfg.data.text)
        gold, inputs = utterances.gold, ["".join(c) for c in utterances.characters]
    if ["".join(w) for w in written] != inputs:
        raise InputError(f"segmentation.txt does not spell the {len(inputs)} inputs of "
                         f"{cfg.data.text}", path=str(folder.segmentation))
    examples = "".join(
        f"<tr><td>{esc(' '.join(w))}</td>"
        + (f"<td>{esc(' '.join(g))}</td>" if cfg.data.gold else "") + "</tr>"
        for w, g in list(zip(written, gold))[:EXAMPLE_ROWS])
    examples = (f"<p>The first {min(EXAMPLE_ROWS, len(written))} of {len(written)} inputs.</p>"
                f"<table><tr><th>segmentation</th>"
                + ("<th>gold</th>" if cfg.data.gold else "") + f"</tr>{examples}</table>")
    if not cfg.data.gold:
        return (_section("scores", "Scores", _missing("The run has no gold (data.gold: false).")),
                _section("examples", "Examples", examples))
    rows = [("this segmentation", evaluate_segmentation(written, gold)),
            *baseline_scores(gold).items()]
    body = ("<p>Every input once, against its gold (a token is right when both its edges are; "
            "the edges of an input are not boundaries).</p>" + _scores_table(rows, True))
    if conllu:
        split = words.split
        segmented = dict(zip(inputs, written))
        rows = [("this segmentation", evaluate_segmentation(by_type(segmented, split), split)),
                *baseline_scores(split).items()]
        body += (f"<p>Boundaries on every occurrence of the {len(split)} written words the "
                 f"corpus writes as two or more tokens:</p>" + _scores_table(rows, False))
    return _section("scores", "Scores", body), _section("examples", "Examples", examples)


def build_segment_report(run_dir: str | Path) -> str:
    """The HTML page (a string) for the segmentation run in `run_dir`."""
    from treewright.adaptor.config import load_segment_config

    folder = RunFolder(run_dir, "segment")
    if not folder.config.is_file():
        raise InputError("no config.yaml: not a run folder", path=str(folder.path))
    config_text = folder.config.read_text(encoding="utf-8")
    cfg = load_segment_config(folder.config)
    metrics, bad = read_metrics(folder.metrics) if folder.metrics.is_file() else ([], [])
    notes = [f"metrics.jsonl lines not read (not JSON objects): {bad[:5]}"] if bad else []
    written = None
    if folder.segmentation.is_file():
        written = [line.split() for line in
                   folder.segmentation.read_text(encoding="utf-8").splitlines()]
    pooled = "the segmentation is the reported chain's last state"
    if folder.checkpoint.is_file():
        sweeps, samples = checkpoint_progress(folder)
        if samples:
            pooled = (f"the segmentation pools {samples} recorded analyses (every chain's "
                      f"late sweeps) by the cut rule {cfg.sampler.cut_rule}")
        notes.insert(0, f"{sweeps} of {cfg.sampler.sweeps} sweeps done")
    scores, examples = _evaluation(cfg, folder, written)
    unit = "morphs of words" if cfg.grammar.unit == "morphs" else "words of utterances"
    header = (f"<h1>treewright segmentation run: {esc(folder.path.name)}</h1>"
              f"<p>Folder {esc(folder.path)}; {esc(unit)} from {esc(cfg.data.text)}, "
              f"{cfg.sampler.chains} chain(s); {esc(pooled)}.</p>"
              + ("<ul class='notes'>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>"
                 if notes else ""))
    nav = "".join(f'<a href="#{i}">{t}</a> ' for i, t in (
        ("scores", "scores"), ("curves", "curves"), ("lexicon", "lexicon"),
        ("examples", "examples"), ("config", "config")))
    sections = [scores, _curves(metrics), _lexicon(folder.lexicon), examples,
                _section("config", "Configuration", f"<pre>{esc(config_text)}</pre>")]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>treewright report: {esc(folder.path.name)}</title>"
            f"<style>{STYLE}</style></head><body>{header}<nav>{nav}</nav>"
            f"{''.join(sections)}</body></html>\n")


def write_segment_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """Write `build_segment_report(run_dir)` to `out` (default run_dir/report.html)."""
    from treewright.safeio import write_output_text

    path = Path(out) if out is not None else RunFolder(run_dir, "segment").report
    write_output_text(path, build_segment_report(run_dir))
    return path
