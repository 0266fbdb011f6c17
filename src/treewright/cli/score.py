"""treewright score: per-sentence log-probability under a grammar, then a corpus summary."""

from __future__ import annotations

import argparse

from treewright.cli.common import add_budget_argument

EXAMPLES = """examples:
  treewright score src/treewright/data/examples/astronomers.pcfg sentences.txt
  echo "astronomers saw stars with ears" | treewright score src/treewright/data/examples/astronomers.pcfg -

TEXT is raw text, one sentence per line; a bracketed-tree or CoNLL-U file (see `parse`) gives one
sentence per tree or sentence block, its words read as `evaluate` reads gold (empty elements
removed; a grammar trained on tags reads its tags), "line" being the record's first line. Given
a run folder or JSON export, such a file is read as `evaluate --text` reads it: as the run read
its training corpus, so the words of the tags it removed (data.drop_tags) are left out, and a
record with nothing left stops with its line.

Each sentence (non-blank line) gives one JSON line: {"line", "tokens", "logprob", "parsed",
"unknown"}; logprob is the natural log of the sum over all trees, null when the sentence has no
parse. Values carry the digits their precision supports (about 7 in float32, the default;
--float64 for more). A sentence too long for --memory-budget is named on standard error and
gets a line with logprob null and "over_memory_budget": true. The last line is the summary:
total log-likelihood, per-word cross-entropy and perplexity over parsed sentences (null when none
parsed), and the count of sentences over the budget. On a terminal a progress bar runs on standard error.

The run folder of factored rules (model.parameterization independent, independent-neural or
lowrank; the run kept its last restart) is scored with its model from the checkpoint, through its
own engine pass, never loading grammar.pcfg into an (NT, S, S) rule tensor (its training corpus
must still be where the run's config points; the memory budget does not apply).
"""

SCORE_GROUP = 1024  # sentences between two updates of the progress bar, for a factored run


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar", help="grammar: a grammar text file, a JSON export or a run folder")
    p.add_argument("text", help="raw text, one sentence per line, whitespace tokens ('-': "
                                "stdin, raw text only); or a file of bracketed trees or "
                                "CoNLL-U, one sentence per record")
    p.add_argument("--batch-size", type=int, default=64)
    p.add_argument("--float64", action="store_true", help="compute in double precision")
    add_budget_argument(p)


def run(args) -> int:
    import torch

    from treewright.budget import BudgetPlan, plan_budget, run_plan
    from treewright.cli.common import dumps, read_as_run_read, shortest, warn_over_budget
    from treewright.export import open_grammar, open_run_record  # text, JSON export or run folder
    from treewright.inference import corpus_summary, score, score_rules
    from treewright.tracking import terminal_progress

    from treewright.induce import load_factored

    dtype = torch.float64 if args.float64 else torch.float32
    factored = load_factored(args.grammar)  # None: not a run of factored rules
    if factored is not None:
        # Its own engine pass: the grammar file would load into the (NT, S, S) rule tensor.
        source = open_run_record(args.grammar)
        lines, inputs = read_as_run_read(args.text, source)
        plan = BudgetPlan.unbudgeted([len(w) for w in inputs], SCORE_GROUP)

        def work(group):
            return score_rules(factored.rules, factored.vocab, group, args.batch_size, dtype)
    else:
        source = open_grammar(args.grammar)
        grammar = source.grammar
        lines, inputs = read_as_run_read(args.text, source)
        plan = plan_budget(grammar, [len(w) for w in inputs], args.memory_budget, dtype,
                           args.batch_size)
        warn_over_budget(plan, grammar, lines, args.text, dtype, "scored")

        def work(group):
            return score(grammar, group, args.batch_size, dtype)
    with terminal_progress(len(inputs) - len(plan.over), "score") as progress:
        scores = run_plan(plan, inputs, work, progress)
    for (line, words), s in zip(lines, scores):
        if s is None:
            print(dumps({"line": line, "tokens": words, "logprob": None, "parsed": False,
                         "over_memory_budget": True}))
            continue
        print(dumps({"line": line, "tokens": s.words, "logprob": shortest(s.logprob, dtype),
                     "parsed": s.parsed, "unknown": s.unknown}))
    summary = corpus_summary([s for s in scores if s is not None])
    summary = {k: shortest(v, dtype) if isinstance(v, float) else v for k, v in summary.items()}
    summary["over_memory_budget"] = len(plan.over)
    if not summary["parsed"]:
        summary["log_likelihood"] = None  # a sum over no sentence is no score (not 0)
    print(dumps({"summary": summary}))
    return 0
