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

import torch
from torch import Tensor

from treewright.grammar import rules_text
from treewright.params.tabular import RuleTensors, keep_most_probable, rules_to_grammar
from treewright.runfolder import RunFolder
from treewright.safeio import atomic_write_bytes, atomic_write_text
from treewright.train.config import INDEPENDENT_MAX_DENSE_RULES
from treewright.train.start import Symbols
from treewright.vocab import Vocabulary


@dataclass
class RunResult:
    """A finished run: the result grammar's file, the restart kept, and per-restart scores."""
    grammar_path: Path
    best_restart: int
    restarts: list = field(default_factory=list)


@dataclass
class GrammarText:
    """A grammar to save that is never formed as a `Grammar`, whose (NT, S, S) tensor would not
    fit in memory: its text (`grammar.rules_text`)."""
    text: str

    def save(self, path: str | Path) -> None:
        atomic_write_text(Path(path), self.text)


def capped_grammar(rules, nonterminals: list[str], preterminals: list[str], vocab, start: str,
                   limit: int | None):
    """The rules as a `Grammar` to save, with at most `limit` binary rules (each nonterminal's
    most probable, renormalised), and a note saying what was left out (None: nothing). Factored
    rules with more than `INDEPENDENT_MAX_DENSE_RULES` rules come back as a `GrammarText`,
    written from each nonterminal's kept rules without the dense tensor."""
    # Factored rules that name their rule count and rank their own most probable rules
    # (`IndependentRules`) are never formed whole: NT x S^2 may not fit in memory.
    factored = hasattr(rules, "most_probable")
    dense = None if factored else rules.dense()
    count = rules.binary_rules if factored else dense.binary.numel()
    note = None
    text = None
    if limit is not None and count > limit:
        per_symbol = max(1, limit // len(nonterminals))
        if factored and count > INDEPENDENT_MAX_DENSE_RULES:
            b, c, values, removed = rules.most_probable_pairs(per_symbol)
            text = _pairs_text(rules, b, c, values, nonterminals, preterminals, vocab, start)
        elif factored:
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
    if text is not None:
        return text, note
    return rules_to_grammar(dense, nonterminals, preterminals, vocab, start), note


def _pairs_text(rules, b: Tensor, c: Tensor, values: Tensor, nonterminals: list[str],
                preterminals: list[str], vocab, start: str) -> GrammarText:
    """The grammar file of factored rules from each nonterminal's kept binary rules (child ids
    `b`, `c` and log-probabilities `values`, (NT, k)), each distribution renormalised in float64
    as `rules_to_grammar` renormalises it."""
    nt, s = len(nonterminals), len(nonterminals) + len(preterminals)
    root = rules.root.detach().double().log_softmax(0)
    lexical = rules.lexical.detach().double().log_softmax(1)
    lexical = torch.cat([lexical.new_full((nt, lexical.shape[1]), float("-inf")), lexical])
    logp = values.double().log_softmax(1)
    order = (b * s + c).argsort(1)                                       # row-major (B, C)
    b, c, logp = b.gather(1, order), c.gather(1, order), logp.gather(1, order)
    keep = torch.isfinite(logp)

    def rows():
        for a in range(nt):
            yield b[a][keep[a]].tolist(), c[a][keep[a]].tolist(), logp[a][keep[a]].tolist()

    return GrammarText(rules_text(start, nonterminals, preterminals, vocab, root, rows(),
                                  lexical))


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
    held = dev.get("dev/loglik_per_word")
    dev_note = "no dev log-likelihood" if held is None else \
        f"dev log-likelihood per word {held:.4f}"
    trained = "none" if objective is None else f"{objective:.4f}"
    return record, (f"restart {restart} finished: {dev_note}, training objective per word "
                    f"{trained}")


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
