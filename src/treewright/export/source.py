"""Where a grammar comes from: a grammar text file, a JSON export, or a training run folder.

A run folder (see `treewright.train.loop`) is recognised by its `grammar.pcfg`; its
`config.yaml` and data summary are read as the grammar's training record.
"""

from __future__ import annotations

import datetime
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import yaml

from treewright.errors import InputError
from treewright.grammar import Grammar, check_room, load_grammar
from treewright.runfolder import GRAMMAR, RunFolder

# Run folders written before training wrote data_summary.json: the corpus lines of train.log
# stand in for it.
_LOG_SUMMARY_PREFIXES = ("training corpus:", "dev corpus:", "partial brackets:")


@dataclass
class GrammarSource:
    """A grammar and what is known of how it was made.

    grammar_path: the file the rules were read from.
    run_dir: the training run folder, or None for a bare grammar file.
    training: None for a bare grammar file; for a run folder a dict with "config" (config.yaml
        as data, or None when absent), "data_summary" (data_summary.json as data, or None) and
        "result" (result.json as data, or None). A JSON export carries its own record.
    """
    grammar: Grammar
    grammar_path: Path
    run_dir: Path | None
    training: dict | None


def resolve_grammar_path(path: str | Path) -> tuple[Path, Path | None]:
    """(grammar file, run folder or None) for a grammar file or a run folder."""
    path = Path(path)
    if path.is_dir():
        grammar_path = RunFolder(path).grammar
        if not grammar_path.is_file():
            if RunFolder(path, "segment").checkpoint.is_file():
                raise InputError("a segmentation run (treewright segment) has no grammar; "
                                 "treewright report and treewright export --to json|text "
                                 "read it", path=str(path))
            raise InputError(f"a run folder must hold {GRAMMAR} (the run has not finished, "
                             "or this is not a run folder)", path=str(path))
        return grammar_path, path
    if not path.exists():
        raise InputError("no such grammar file or run folder", path=str(path))
    return path, None


def is_json_export(path: Path) -> bool:
    """True when the file's first non-blank character is '{' (a JSON export)."""
    with open(path, "rb") as f:
        head = f.read(4096).lstrip(b"\xef\xbb\xbf \t\r\n")
    return head.startswith(b"{")


def open_grammar(path: str | Path) -> GrammarSource:
    """Read a grammar text file, a JSON export or a run folder (InputError naming the file)."""
    from treewright.export.jsonformat import load_grammar_export

    grammar_path, run_dir = resolve_grammar_path(path)
    if is_json_export(grammar_path):
        export = load_grammar_export(grammar_path)
        return GrammarSource(export.grammar, grammar_path, None, export.training)
    training = read_training_record(run_dir) if run_dir is not None else None
    # A run says its symbol counts: a file too large to load is refused before it is read.
    check_run_room((training or {}).get("config"), grammar_path)
    grammar = load_grammar(grammar_path)
    return GrammarSource(grammar, grammar_path, run_dir, training)


def check_run_room(config: Any, grammar_path: str | Path) -> None:
    """InputError naming `grammar_path` when the symbol counts a training run's config gives
    (`model.nonterminals`, `model.preterminals`) make a rule tensor too large for free memory
    (`grammar.check_room`); nothing when the config gives no counts."""
    model = config.get("model") if isinstance(config, dict) else None
    if isinstance(model, dict) and isinstance(model.get("nonterminals"), int) \
            and isinstance(model.get("preterminals"), int):
        nt = model["nonterminals"]
        check_room(nt, nt + model["preterminals"], str(grammar_path))


def open_run_record(path: str | Path) -> GrammarSource:
    """A run folder's training record without its grammar (`grammar` None): for a caller that
    decodes with the run's model and must not load the grammar file's rule tensor."""
    grammar_path, run_dir = resolve_grammar_path(path)
    if run_dir is None:
        raise InputError("a run folder is needed here, not a grammar file", path=str(path))
    return GrammarSource(None, grammar_path, run_dir, read_training_record(run_dir))


def saved_restarts(source: GrammarSource | str | Path) -> int:
    """How many restart grammars a training run folder saved and lists in its result.json (0
    for a grammar file, a JSON export or a run that did not finish). `source` is an opened
    grammar or a path. With two or more, the commands that decode default to the consensus
    decoder."""
    if isinstance(source, GrammarSource):
        run_dir, training = source.run_dir, source.training
    else:
        run_dir = Path(source) if Path(source).is_dir() else None
        training = read_training_record(run_dir) if run_dir is not None else None
    if run_dir is None:
        return 0
    result = (training or {}).get("result")
    records = result.get("restarts") if isinstance(result, dict) else None
    if not isinstance(records, list):
        return 0
    folder = RunFolder(run_dir)
    return sum(1 for r in records if isinstance(r, dict) and isinstance(r.get("restart"), int)
               and folder.restart_grammar(r["restart"]).is_file())


def open_restart_grammars(path: str | Path, purpose: str = "decoding with several grammars"
                          ) -> list[GrammarSource]:
    """Every restart grammar a training run folder saved (`restart-<r>.pcfg`), the restart the
    run kept first, then the others in restart order; each with the run's training record, so
    the words are read as the run read them (one lowercasing for all: the restarts share the
    run's config). The restarts come from the run's result.json.

    Raises InputError naming the path, with `purpose` in the message, for a grammar file or a
    JSON export (one grammar), a folder whose run did not finish or saved fewer than two
    restarts (`train.restarts`), and a restart grammar that is missing.
    """
    path = Path(path)
    need = (f"{purpose} needs a training run folder that saved two or more restart grammars "
            "(train.restarts >= 2)")
    if not path.is_dir():
        raise InputError(f"{need}; this is a single grammar", path=str(path))
    kept = open_grammar(path)
    folder = RunFolder(path)
    result = (kept.training or {}).get("result")
    if result is None:
        raise InputError(f"{need}; this folder has no {folder.result.name} listing its "
                         "restarts (not a finished training run)", path=str(path))
    records = result.get("restarts") if isinstance(result, dict) else None
    if not isinstance(records, list) or not all(
            isinstance(r, dict) and isinstance(r.get("restart"), int) for r in records):
        raise InputError("no list of restarts with their numbers under \"restarts\"",
                         path=str(folder.result))
    if len(records) < 2:
        raise InputError(f"{need}; this run saved {len(records)}", path=str(path))
    best = result.get("best_restart")
    ordered = sorted((r["restart"] for r in records), key=lambda r: (r != best, r))
    sources = []
    for r in ordered:
        grammar_path = folder.restart_grammar(r)
        if not grammar_path.is_file():
            raise InputError(f"restart {r}'s grammar is missing ({folder.result.name} lists "
                             "it)", path=str(grammar_path))
        sources.append(GrammarSource(load_grammar(grammar_path), grammar_path, path,
                                     kept.training))
    return sources


def load(path: str | Path) -> Grammar:
    """The grammar of a grammar text file, a JSON export or a run folder."""
    return open_grammar(path).grammar


def read_training_record(run_dir: Path) -> dict:
    """The settings and data summary of a run folder (see `GrammarSource.training`)."""
    folder = RunFolder(run_dir)
    config = None
    config_path = folder.config
    if config_path.is_file():
        try:
            config = yaml.safe_load(config_path.read_text(encoding="utf-8"))
        except yaml.YAMLError as err:
            raise InputError(f"config.yaml is not valid YAML ({err})",
                             path=str(config_path)) from None
        config = _plain(config)
    summary: Any = None
    if folder.data_summary.is_file():
        summary = _read_json(folder.data_summary)
    elif folder.log.is_file():
        lines = folder.log.read_text(encoding="utf-8", errors="replace").splitlines()
        # Log lines start with a timestamp "YYYY-MM-DD HH:MM:SS "; the text follows it.
        texts = [line.split(" ", 2)[2] if line.count(" ") >= 2 else line for line in lines]
        kept = [t for t in texts if t.startswith(_LOG_SUMMARY_PREFIXES)]
        summary = kept or None
    result = _read_json(folder.result) if folder.result.is_file() else None
    return {"config": config, "data_summary": summary, "result": result}


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"not valid JSON ({err})", path=str(path)) from None


def _plain(value: Any) -> Any:
    """YAML data as JSON data: dates become ISO strings, non-finite floats strings, keys str."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (datetime.date, datetime.datetime)):
        return value.isoformat()
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return value


# ---- rules as records --------------------------------------------------------------------------


@dataclass(frozen=True)
class Rule:
    """One rule. kind: "root" (start -> A, the root distribution), "binary" (A -> B C) or
    "lexical" (A -> word). rhs holds symbol names, or the one word of a lexical rule."""
    lhs: str
    rhs: tuple[str, ...]
    prob: float
    kind: str

    def __str__(self) -> str:
        from treewright.grammar import quote
        rhs = quote(self.rhs[0]) if self.kind == "lexical" else " ".join(self.rhs)
        return f"{self.lhs} -> {rhs} {self.prob!r}"


def iter_rules(grammar: Grammar) -> Iterator[Rule]:
    """Every rule of nonzero probability, in the order of the grammar text format: the root
    rules (when the start symbol is not itself a nonterminal), then per symbol its binary rules
    and its lexical rules. prob is exp of the stored log-probability, as the text format writes
    it, so the numbers are the ones a saved file holds."""
    import torch

    names = grammar.symbols
    nt = len(grammar.nonterminals)
    if not grammar.root_is_symbol:
        root = grammar.root.double()
        for a in range(nt):
            if root[a] > -math.inf:
                yield Rule(grammar.start, (names[a],), math.exp(float(root[a])), "root")
    binary = grammar.binary.double()
    lexical = grammar.lexical.double()
    words = grammar.vocab.words
    for a, lhs in enumerate(names):
        if a < nt:
            for b, c in torch.nonzero(torch.isfinite(binary[a])).tolist():
                yield Rule(lhs, (names[b], names[c]), math.exp(float(binary[a, b, c])), "binary")
        for w in torch.nonzero(torch.isfinite(lexical[a])).flatten().tolist():
            yield Rule(lhs, (words[w],), math.exp(float(lexical[a, w])), "lexical")
