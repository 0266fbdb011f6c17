"""Finishing a training run: each restart's grammar saved (`save_restart_grammar`, capped at
`output.max_saved_rules`), and at the end the restart kept (`finish_run`: best dev
log-likelihood, else training objective), copied to the result grammar with a record of every
restart. The file names are those of `runfolder.RunFolder`.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

from treewright.params.tabular import RuleTensors, keep_most_probable, rules_to_grammar
from treewright.runfolder import RunFolder
from treewright.safeio import atomic_write_bytes, atomic_write_text
from treewright.train.start import Symbols
from treewright.vocab import Vocabulary


@dataclass
class RunResult:
    """A finished run: the result grammar's file, the restart kept, and per-restart scores."""
    grammar_path: Path
    best_restart: int
    restarts: list = field(default_factory=list)


def capped_grammar(rules, nonterminals: list[str], preterminals: list[str], vocab, start: str,
                   limit: int | None):
    """The rules as a `Grammar` to save, with at most `limit` binary rules (each nonterminal's
    most probable, renormalised), and a note saying what was left out (None: nothing)."""
    # Factored rules that name their rule count and rank their own most probable rules
    # (`IndependentRules`) are never formed whole: NT x S^2 may not fit in memory.
    factored = hasattr(rules, "most_probable")
    dense = None if factored else rules.dense()
    count = rules.binary_rules if factored else dense.binary.numel()
    note = None
    if limit is not None and count > limit:
        per_symbol = max(1, limit // len(nonterminals))
        if factored:
            dense, removed = rules.most_probable(per_symbol)
        else:
            binary, removed = keep_most_probable(dense.binary, per_symbol)
            dense = RuleTensors(dense.root, binary, dense.lexical)
        worst = int(removed.argmax())
        note = (f"the model has {count:,} binary rules, more than "
                f"output.max_saved_rules ({limit:,}); saved each nonterminal's {per_symbol:,} "
                f"most probable, renormalised, leaving out probability mass "
                f"{float(removed.mean()):.4g} per nonterminal on average (at most "
                f"{float(removed[worst]):.4g}, {nonterminals[worst]}); the checkpoint keeps the "
                "full model")
    elif dense is None:
        dense = rules.dense()
    return rules_to_grammar(dense, nonterminals, preterminals, vocab, start), note


def save_restart_grammar(folder: RunFolder, restart: int, rules, symbols: Symbols,
                         vocab: Vocabulary, limit: int | None, write: bool) -> tuple[Path, str | None]:
    """Restart `restart`'s grammar file (written when `write`: rank 0 of a worker group) and
    the note of what the cap left out, if anything."""
    path = folder.restart_grammar(restart)
    grammar, note = capped_grammar(rules, symbols.nonterminals, symbols.preterminals, vocab,
                                   symbols.start, limit)
    if write:
        grammar.save(path)
    return path, None if note is None else f"{path.name}: {note}"


def restart_record(restart: int, path: Path, dev: dict, objective: float | None
                   ) -> tuple[dict, str]:
    """What the run keeps of a finished restart (its grammar file, dev log-likelihood per word
    and final training objective per word), and the note that says so."""
    record = {"restart": restart, "grammar": path.name,
              "dev_loglik_per_word": dev.get("dev/loglik_per_word"),
              "final_objective_per_word": objective}
    return record, (f"restart {restart} finished: dev log-likelihood per word "
                    f"{dev.get('dev/loglik_per_word')}, training objective per word {objective}")


def finish_run(folder: RunFolder, finished: list[dict], by_dev: bool,
               write: bool) -> tuple[RunResult, str | None]:
    """The run's result: the restart with the best dev log-likelihood per word (`by_dev`), else
    the best final training objective. With `write`, its grammar becomes the result grammar
    and the record of every restart is written; returns the note that says so."""
    def key(r: dict) -> float:
        value = r["dev_loglik_per_word"] if by_dev else r["final_objective_per_word"]
        return float("-inf") if value is None or math.isnan(value) else value

    best = max(finished, key=key)
    result = RunResult(folder.grammar, best["restart"], finished)
    if not write:
        return result, None
    # Copy the bytes rather than re-render: the result is exactly the restart's file. Written
    # atomically, so a kill mid-copy never leaves a half-written grammar.pcfg.
    atomic_write_bytes(folder.grammar, (folder.path / best["grammar"]).read_bytes())
    record = {"best_restart": best["restart"],
              "selected_by": "dev log-likelihood" if by_dev else "training objective",
              "restarts": finished}
    atomic_write_text(folder.result, json.dumps(record, indent=2) + "\n")
    return result, f"kept restart {best['restart']}; grammar written to {folder.grammar}"
