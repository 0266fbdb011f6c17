"""The whole job on the embedded demo corpus, one stage after another.

The corpus is the logbook language of an invented river-trading settlement (see
`treewright/data/demo/README.md`): raw training sentences, dev and test sentences with gold trees,
and the grammar that generated them. `run_demo` reads and summarises it, induces a grammar with EM,
parses the test set, scores the trees against gold beside the branching baselines, refines the
induced categories by split-merge, exports the grammar (listing and JSON) and writes the HTML
report. Every stage uses the library functions the commands use, so the demo is also a map of the
commands to run on one's own data.
"""

from __future__ import annotations

import json
import shutil
import sys
import time
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import TextIO

DEMO_FILES = ("train.txt", "dev.trees", "test.trees", "grammar.pcfg")

# Budgets: "full" is what `treewright demo` runs (about two minutes on a 2-core machine);
# "quick" is for tests and a first look, on a slice of the training corpus.
BUDGETS = {
    "full": {"train_sentences": None, "epochs": 20, "restarts": 1, "refine_cycles": 1,
             "refine_iterations": 4},
    "quick": {"train_sentences": 300, "epochs": 3, "restarts": 1, "refine_cycles": 1,
              "refine_iterations": 1},
}


def demo_data_dir() -> Path:
    """The folder of the embedded demo corpus inside the installed package."""
    folder = Path(str(resources.files("treewright") / "data" / "demo"))
    missing = [name for name in DEMO_FILES if not (folder / name).exists()]
    if missing:
        from treewright.errors import InputError
        raise InputError(f"the demo corpus is incomplete (missing {', '.join(missing)}); "
                         "reinstall treewright", path=str(folder))
    return folder


@dataclass
class DemoResult:
    out_dir: Path
    artifacts: dict[str, Path] = field(default_factory=dict)
    scores: dict = field(default_factory=dict)
    seconds: float = 0.0


class _Stages:
    """Numbered stage headings and timings on the given stream."""

    def __init__(self, stream: TextIO, total: int):
        self.stream, self.total, self.k = stream, total, 0
        self.started = time.monotonic()

    def begin(self, title: str) -> None:
        self.k += 1
        elapsed = time.monotonic() - self.started
        print(f"\n[{self.k}/{self.total}] {title}  (t = {elapsed:.0f} s)", file=self.stream,
              flush=True)

    def say(self, text: str) -> None:
        print("    " + text.replace("\n", "\n    "), file=self.stream, flush=True)


DEMO_MARK = "treewright demo"  # in the config.yaml header of every run the demo starts


def _fresh(folder: Path) -> Path:
    """`folder` emptied for a new run when an earlier demo left one there (a finished run keeps
    its checkpoint, which a new run would refuse); any other run folder is left alone."""
    if folder.exists() and any(folder.iterdir()):
        from treewright.runfolder import RunFolder
        config = RunFolder(folder).config
        header = config.read_text(encoding="utf-8").split("\n", 1)[0] if config.exists() else ""
        if DEMO_MARK not in header:
            from treewright.errors import InputError
            raise InputError("this folder is not one the demo made; give the demo another "
                             "--out folder", path=str(folder))
        shutil.rmtree(folder)
    return folder


def run_demo(out_dir: str | Path = "runs/demo", budget: str = "full",
             stream: TextIO | None = None) -> DemoResult:
    from treewright.corpus import read_corpus
    from treewright.decode import decode
    from treewright.evaluation import evaluate_brackets
    from treewright.export import expected_counts, format_listing, save_grammar_json, summarize
    from treewright.grammar import load_grammar
    from treewright.inference import corpus_summary, score
    from treewright.refine import load_refine_config
    from treewright.refiner import refine
    from treewright.report.html import write_report
    from treewright.safeio import atomic_write_text, check_writable
    from treewright.induce import run
    from treewright.runfolder import RunFolder
    from treewright.train import load_train_config
    from treewright.trees import Tree

    if budget not in BUDGETS:
        raise ValueError(f"budget must be one of {sorted(BUDGETS)}")
    plan = BUDGETS[budget]
    stream = stream or sys.stdout
    out = check_writable(Path(out_dir))
    data = demo_data_dir()
    result = DemoResult(out)
    stages = _Stages(stream, 8)

    stages.begin("Reading the demo corpus (an invented river-trading logbook language)")
    train_path = data / "train.txt"
    if plan["train_sentences"]:
        lines = train_path.read_text(encoding="utf-8").splitlines()[:plan["train_sentences"]]
        train_path = out / "train-slice.txt"
        atomic_write_text(train_path, "\n".join(lines) + "\n")
    corpora = {name: read_corpus(path) for name, path in
               (("train", train_path), ("dev", data / "dev.trees"), ("test", data / "test.trees"))}
    for name, corpus in corpora.items():
        stages.say(f"{name}: {corpus.report.format().splitlines()[0]}")

    stages.begin(f"Inducing a grammar with EM ({plan['epochs']} iterations, 10 nonterminals, "
                 "20 preterminals)")
    train_dir = _fresh(out / "train")
    cfg = load_train_config(None, [
        f"data.train={train_path}", f"data.dev={data / 'dev.trees'}",
        "data.min_count=2",  # singletons train the unknown-word token, so new words parse
        "model.nonterminals=10", "model.preterminals=20", f"train.epochs={plan['epochs']}",
        f"train.restarts={plan['restarts']}", f"output.run_dir={train_dir}",
        "output.stdout_metrics=false"])
    trained = run(cfg, train_dir, stream=stream, config_source=DEMO_MARK)
    train_folder = RunFolder(train_dir)
    grammar = load_grammar(trained.grammar_path)
    result.artifacts["grammar"] = trained.grammar_path
    result.artifacts["metrics"] = train_folder.metrics

    stages.begin("Tracking the curves")
    curve = [json.loads(line) for line in train_folder.metrics.read_text().splitlines()
             if line.strip()]
    per_epoch = [m for m in curve if "train/loglik_per_word" in m]
    for m in per_epoch[:: max(1, len(per_epoch) // 6)] + per_epoch[-1:]:
        stages.say(f"step {m['step']:>3}: train log-lik/word {m['train/loglik_per_word']:.3f}, "
                   f"perplexity {m.get('train/perplexity', float('nan')):.1f}, dev F1 "
                   f"{m.get('dev/sentence_f1', float('nan')):.3f}")

    stages.begin("Parsing the test set (minimum Bayes risk over span posteriors)")
    test = corpora["test"].sentences
    decoded = decode(grammar, [s.tokens for s in test], decoder="mbr", tree_logprobs=False)
    pred_path = out / "test.pred.trees"
    atomic_write_text(pred_path, "".join(
        (d.tree.to_string() if d.tree is not None else "(NOPARSE " + " ".join(s.words) + ")")
        + "\n" for d, s in zip(decoded, test)))
    result.artifacts["test parses"] = pred_path
    stages.say(f"{sum(d.tree is not None for d in decoded)} of {len(test)} sentences parsed; "
               f"trees in {pred_path}")

    stages.begin("Scoring the induced trees against the gold trees, beside the baselines")
    # A sentence without a parse is scored as a flat tree (no brackets), never dropped.
    preds = [d.tree if d.tree is not None else Tree("NOPARSE", list(s.words))
             for d, s in zip(decoded, test)]
    evaluation = evaluate_brackets(preds, [s.tree for s in test])
    # The first table (model beside the baselines) on screen; everything in the JSON file.
    stages.say("\n\n".join(evaluation.format_table().split("\n\n")[:2]))
    atomic_write_text(out / "test.evaluation.json", json.dumps(evaluation.to_dict(), indent=2))
    result.artifacts["evaluation"] = out / "test.evaluation.json"
    ceiling = corpus_summary(score(load_grammar(data / "grammar.pcfg"),
                                   [s.tokens for s in test]))
    induced = corpus_summary(score(grammar, [s.tokens for s in test]))
    stages.say(f"test perplexity: induced grammar {induced['perplexity']:.1f}, generating "
               f"grammar (the ceiling) {ceiling['perplexity']:.1f}")
    result.scores = {"test": evaluation.to_dict(), "perplexity": induced["perplexity"],
                     "ceiling_perplexity": ceiling["perplexity"]}

    stages.begin(f"Refining the induced categories by split-merge ({plan['refine_cycles']} "
                 "cycle from raw text)")
    refine_dir = _fresh(out / "refine")
    rcfg = load_refine_config(None, [
        "data.start=text", f"data.train={train_path}", f"data.dev={data / 'dev.txt'}",
        f"data.grammar={trained.grammar_path}", f"refine.cycles={plan['refine_cycles']}",
        f"refine.em_iterations={plan['refine_iterations']}", "refine.smoothed_iterations=1",
        f"output.run_dir={refine_dir}", "output.stdout_metrics=false"])
    refined = refine(rcfg, refine_dir, stream=stream, config_source=DEMO_MARK)
    result.artifacts["refined grammar"] = refined.grammar_path
    for m in refined.metrics:
        stages.say(f"cycle {m.get('cycle')}: {m.get('fine_symbols')} symbols, held-out "
                   f"log-lik/word {m.get('heldout/loglik_per_word', float('nan')):.4f} "
                   f"({m.get('heldout/unparsed', 0)} held-out sentences without a parse)")

    stages.begin("Exporting the induced grammar (readable listing and JSON)")
    counts = expected_counts(grammar, [s.tokens for s in corpora["dev"].sentences])
    summaries = summarize(grammar, counts)
    listing_path = out / "grammar.listing.txt"
    atomic_write_text(listing_path, format_listing(grammar, summaries, 0.01, 10,
                                                   corpus_note="usage counted on the dev set"))
    json_path = out / "grammar.json"
    save_grammar_json(grammar, json_path)
    result.artifacts["listing"] = listing_path
    result.artifacts["json"] = json_path
    stages.say(f"listing: {listing_path}\nJSON: {json_path}")

    stages.begin("Writing the HTML report")
    report = write_report(train_dir, gold=data / "test.trees", examples=3)
    result.artifacts["report"] = report
    stages.say(f"open {report} in a browser")

    result.seconds = time.monotonic() - stages.started
    print(f"\nDone in {result.seconds:.0f} s. Everything is in {out}:", file=stream)
    for name, path in result.artifacts.items():
        print(f"  {name:<16} {path}", file=stream)
    print("\nOn your own text (one sentence per line), the same job is:\n"
          "  treewright train configs/em_demo.yaml data.train=YOUR.txt data.dev=YOUR_DEV.txt "
          "output.run_dir=runs/mine\n"
          "  treewright parse runs/mine/grammar.pcfg YOUR_TEST.txt --decoder mbr > pred.trees\n"
          "  treewright evaluate pred.trees GOLD.trees      (bracketed trees or CoNLL-U)\n"
          "  treewright report runs/mine --gold GOLD.trees", file=stream)
    return result
