"""The JSON export of a grammar (format version 1), written and validated on load.

Top-level object, field by field (every field is required except `word_shapes`; `null` where
noted):

- `format` (string): always "treewright-grammar".
- `format_version` (integer): 1. A reader refuses any other version.
- `start` (string): the start symbol. If it is one of `nonterminals`, trees have it on top
  (textbook grammars); otherwise it is a separate symbol whose `root` rules give the
  distribution of the top symbol (induced grammars).
- `nonterminals` (list of strings): symbols with binary rules, in the grammar's index order.
- `preterminals` (list of strings): symbols with lexical rules only, in index order. No name
  appears twice across the two lists, and the start symbol is not a preterminal.
- `vocabulary` (list of strings): the word types, in index order, no repeats.
- `unknown_word` (string or null): the vocabulary entry that stands for every unknown word.
- `word_shapes` (integer or null; absent in exports written before it existed, read as null):
  the word shape scheme (`treewright.wordshapes.SCHEME`) by which a word outside the vocabulary
  stands for its shape class, when that class is in the vocabulary, before `unknown_word`.
- `rules` (list of objects), each with
  - `kind`: "root" (`start` -> one nonterminal), "binary" (nonterminal -> two symbols) or
    "lexical" (symbol -> one word of `vocabulary`),
  - `lhs` (string): the left-hand side,
  - `rhs` (list of strings): one nonterminal, two symbols, or one word,
  - `prob` (number): the probability, in [0, 1], written with the shortest decimal that reads
    back as the same float64 (so a load gives the same bits as the grammar text format).
  A rule appears at most once. Rules left out have probability zero. The probabilities of each
  left-hand side sum to 1 within 1e-6 (a nonterminal's binary and lexical rules together).
- `training` (object or null): null for a grammar exported from a bare grammar file; from a run
  folder an object with `config` (the run's config.yaml as data, or null), `data_summary`
  (the run's data_summary.json, else the corpus lines of its train.log as a list of strings,
  else null) and `result` (the run's result.json, or null). Kept as given; not validated.
- `counts` (object): `nonterminals`, `preterminals`, `words`, `rules` (integers), a check on
  the lists above.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from treewright.errors import InputError
from treewright.grammar import Grammar, build_grammar, old_subcategory_names
from treewright.safeio import atomic_write_text
from treewright.vocab import Vocabulary
from treewright.wordshapes import SCHEME as SHAPE_SCHEME

FORMAT_NAME = "treewright-grammar"
FORMAT_VERSION = 1
SUM_TOLERANCE = 1e-6  # the same tolerance as the grammar text format
_FIELDS = ("format", "format_version", "start", "nonterminals", "preterminals", "vocabulary",
           "unknown_word", "rules", "training", "counts")
_RULE_FIELDS = ("kind", "lhs", "rhs", "prob")
_RHS_LENGTH = {"root": 1, "binary": 2, "lexical": 1}


@dataclass
class GrammarExport:
    """A loaded JSON export: the grammar and its training record (None for a bare grammar)."""
    grammar: Grammar
    training: dict | None


def grammar_to_json(grammar: Grammar, training: dict | None = None) -> dict:
    """The export as JSON data (see the module docstring)."""
    from treewright.export.source import iter_rules

    rules = [{"kind": r.kind, "lhs": r.lhs, "rhs": list(r.rhs), "prob": r.prob}
             for r in iter_rules(grammar)]
    return {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "start": grammar.start,
        "nonterminals": list(grammar.nonterminals),
        "preterminals": list(grammar.preterminals),
        "vocabulary": list(grammar.vocab.words),
        "unknown_word": grammar.vocab.unk,
        "word_shapes": grammar.vocab.shapes,
        "rules": rules,
        "training": training,
        "counts": {"nonterminals": len(grammar.nonterminals),
                   "preterminals": len(grammar.preterminals),
                   "words": len(grammar.vocab), "rules": len(rules)},
    }


def save_grammar_json(grammar: Grammar, path: str | Path, training: dict | None = None) -> None:
    """Write the JSON export atomically (UTF-8)."""
    atomic_write_text(Path(path), grammar_json_text(grammar, training))


def grammar_json_text(grammar: Grammar, training: dict | None = None) -> str:
    """The JSON export as text: one rule per line, so diffs of two exports read well."""
    data = grammar_to_json(grammar, training)
    rules = data.pop("rules")
    head = json.dumps(data, ensure_ascii=False, indent=1, allow_nan=False)
    body = ",\n".join("  " + json.dumps(r, ensure_ascii=False, allow_nan=False) for r in rules)
    # Put "rules" last: the header fields stay on the first screen of the file.
    return head[:-2] + ',\n "rules": [\n' + body + "\n ]\n}\n"


def load_grammar_json(path: str | Path) -> Grammar:
    """The grammar of a JSON export. Raises InputError naming the file and the field for a
    wrong format or version, a missing or mistyped field, an unknown symbol or word, a repeated
    rule, or probabilities outside [0, 1] or not summing to one."""
    return load_grammar_export(path).grammar


def load_grammar_export(path: str | Path) -> GrammarExport:
    """`load_grammar_json` with the training record kept."""
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("no such grammar file", path=where) from None
    except UnicodeDecodeError as err:
        raise InputError(f"not UTF-8 text (byte {err.start})", path=where) from None
    try:
        data = json.loads(text.lstrip("\ufeff"), parse_constant=_refuse_constant)
    except json.JSONDecodeError as err:
        raise InputError(f"not valid JSON: {err.msg}", path=where, line=err.lineno,
                         column=err.colno) from None
    except ValueError as err:
        raise InputError(str(err), path=where) from None
    return grammar_from_json(data, where)


def _refuse_constant(name: str) -> None:
    raise ValueError(f"JSON constant {name} is not allowed (probabilities are finite numbers)")


def grammar_from_json(data: Any, source: str = "<json>") -> GrammarExport:
    """Validate JSON data of the export format and build the grammar (see load_grammar_json)."""
    def bad(field: str, reason: str) -> InputError:
        return InputError(f"field {field}: {reason}", path=source)

    if not isinstance(data, dict):
        raise InputError("a grammar export must be a JSON object", path=source)
    for name in _FIELDS:
        if name not in data:
            raise bad(name, "missing")
    if data["format"] != FORMAT_NAME:
        raise bad("format", f"{data['format']!r} is not {FORMAT_NAME!r}")
    version = data["format_version"]
    if not isinstance(version, int) or isinstance(version, bool) or version != FORMAT_VERSION:
        raise bad("format_version", f"version {version!r} is not supported (this treewright "
                                    f"reads version {FORMAT_VERSION})")
    start = data["start"]
    if not isinstance(start, str) or not start:
        raise bad("start", "must be a non-empty string")
    nonterminals = _string_list(data, "nonterminals", bad)
    preterminals = _string_list(data, "preterminals", bad)
    words = _string_list(data, "vocabulary", bad)
    renames = old_subcategory_names(nonterminals + preterminals + [start], source)
    if renames:  # an export saved before NAME·k: its NAME@k symbols are subcategories
        nonterminals = [renames.get(n, n) for n in nonterminals]
        preterminals = [renames.get(n, n) for n in preterminals]
        start = renames.get(start, start)
    if not nonterminals:
        raise bad("nonterminals", "a grammar needs at least one nonterminal")
    symbols = nonterminals + preterminals
    index = {name: i for i, name in enumerate(symbols)}
    for field, names in (("nonterminals", nonterminals), ("preterminals", preterminals)):
        if len(set(names)) != len(names):
            raise bad(field, "a symbol is listed twice")
    both = set(nonterminals) & set(preterminals)
    if both:
        raise bad("nonterminals", f"{sorted(both)[0]!r} is also listed in preterminals")
    if start in preterminals:
        raise bad("start", f"the start symbol {start!r} is a preterminal")
    if len(set(words)) != len(words):
        raise bad("vocabulary", "a word is listed twice")
    unk = data["unknown_word"]
    if unk is not None and (not isinstance(unk, str) or unk not in words):
        raise bad("unknown_word", "must be null or a word of the vocabulary")
    shapes = data.get("word_shapes")
    if shapes is not None and (shapes != SHAPE_SCHEME or isinstance(shapes, bool)):
        raise bad("word_shapes", f"{shapes!r} is not null or a supported word shape scheme "
                                 f"(this treewright has scheme {SHAPE_SCHEME})")
    training = data["training"]
    if training is not None and not isinstance(training, dict):
        raise bad("training", "must be an object or null")
    if not isinstance(data["rules"], list):
        raise bad("rules", "must be a list")
    root_is_symbol = start in index
    word_index = {w: i for i, w in enumerate(words)}
    nt = len(nonterminals)
    root: dict[str, float] = {}
    binary: dict[tuple[str, str, str], float] = {}
    lexical: dict[tuple[str, str], float] = {}
    seen: dict[tuple, int] = {}
    for k, rule in enumerate(data["rules"]):
        field = f"rules[{k}]"
        if not isinstance(rule, dict):
            raise bad(field, "must be an object")
        for name in _RULE_FIELDS:
            if name not in rule:
                raise bad(f"{field}.{name}", "missing")
        kind, lhs, rhs, prob = (rule[name] for name in _RULE_FIELDS)
        if renames and isinstance(lhs, str):
            lhs = renames.get(lhs, lhs)
        if renames and isinstance(rhs, list) and kind != "lexical":
            rhs = [renames.get(x, x) if isinstance(x, str) else x for x in rhs]
        if kind not in _RHS_LENGTH:
            raise bad(f"{field}.kind", f"{kind!r} is not one of root, binary, lexical")
        if not isinstance(rhs, list) or len(rhs) != _RHS_LENGTH[kind] \
                or not all(isinstance(x, str) for x in rhs):
            raise bad(f"{field}.rhs", f"a {kind} rule has a list of {_RHS_LENGTH[kind]} "
                                      "string(s) on its right-hand side")
        if not isinstance(prob, (int, float)) or isinstance(prob, bool) \
                or not (0.0 <= prob <= 1.0):
            raise bad(f"{field}.prob", f"probability {prob!r} is not a number in [0, 1]")
        if kind == "root":
            if lhs != start or root_is_symbol:
                raise bad(f"{field}.lhs", "root rules come from the start symbol, and only "
                                          "when it is not itself a nonterminal")
            if rhs[0] not in index or index[rhs[0]] >= nt:
                raise bad(f"{field}.rhs", f"{rhs[0]!r} is not a nonterminal")
        elif not isinstance(lhs, str) or lhs not in index:
            raise bad(f"{field}.lhs", f"{lhs!r} is not a listed symbol")
        elif kind == "binary":
            if index[lhs] >= nt:
                raise bad(f"{field}.lhs", f"{lhs!r} has a binary rule but is a preterminal")
            unknown = [x for x in rhs if x not in index]
            if unknown:
                raise bad(f"{field}.rhs", f"{unknown[0]!r} is not a listed symbol")
        elif rhs[0] not in word_index:
            raise bad(f"{field}.rhs", f"{rhs[0]!r} is not in the vocabulary")
        key = (kind, lhs, tuple(rhs))
        if key in seen:
            raise bad(field, f"repeats rules[{seen[key]}]")
        seen[key] = k
        if kind == "root":
            root[rhs[0]] = float(prob)
        elif kind == "binary":
            binary[(lhs, rhs[0], rhs[1])] = float(prob)
        else:
            lexical[(lhs, rhs[0])] = float(prob)

    def bad_total(name: str, total: float) -> InputError:
        if name == start and not root_is_symbol:
            return bad("rules", f"the root rules of {start} sum to {total!r}, not 1")
        return bad("rules", f"the rules of {name} sum to {total!r}, not 1")

    # The text format's builder, so a grammar read from either format has the same bits.
    grammar = build_grammar(nonterminals, preterminals, Vocabulary(words, unk=unk, shapes=shapes),
                            start, root,
                            binary, lexical, tolerance=SUM_TOLERANCE, bad_total=bad_total,
                            source=source)
    counts = data["counts"]
    expected = {"nonterminals": nt, "preterminals": len(preterminals), "words": len(words),
                "rules": len(data["rules"])}
    if counts != expected:
        raise bad("counts", f"{counts!r} does not match the lists ({expected})")
    return GrammarExport(grammar, training)


def _string_list(data: dict, field: str, bad) -> list[str]:
    value = data[field]
    if not isinstance(value, list) or not all(isinstance(x, str) and x for x in value):
        raise bad(field, "must be a list of non-empty strings")
    return list(value)
