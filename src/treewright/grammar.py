"""A PCFG in Chomsky normal form: symbols, rule log-probabilities, and the grammar text format.

Symbol layout (the engine relies on it): nonterminals first, then preterminals, so a child index
`c < NT` is a nonterminal and `c >= NT` the preterminal `c - NT`.

- `root`    (NT,)       log p(start -> A): the distribution over the tree's top symbol.
- `binary`  (NT, S, S)  log p(A -> B C), S = NT + T.
- `lexical` (S, V)      log p(X -> w). Preterminal rows sum to one on their own; a nonterminal row
                        is -inf unless the grammar lets that symbol emit words too (general CNF),
                        in which case its binary and lexical rules sum to one together.

The induction layout (disjoint nonterminals and preterminals) is the special case where every
nonterminal lexical row is -inf.

Grammar text format (ours; see the README):

    # comments run to the end of the line
    @start S                 the start symbol (required)
    @unknown "<unk>"         the word that stands for every unknown word (optional)
    @word-shapes 1           unknown words first stand for their shape class, scheme 1
                             (`treewright.wordshapes`), when the class is a word of the
                             grammar (optional; refined treebank grammars have it)
    S -> NP VP 1.0           binary rule
    NP -> "stars" 0.18       lexical rule; terminals are double-quoted, \\" and \\\\ escape
    ROOT -> S 0.7            unary rules only from the start symbol: they give the root
                             distribution (then the start symbol has no other rules)
    @adapted Word discount 0 concentration 1.5
                             Word is adapted: a Pitman-Yor process with that discount a
                             (0 <= a < 1) and concentration b (b > -a) caches its subtrees,
                             with the rules of Word as its base (`treewright.adaptor`; optional,
                             one line per adapted symbol, anywhere in the file). A PCFG reader
                             ignores it: the rules alone are the base grammar.

Probabilities are printed as the shortest decimal that reads back as the same float64 (repr),
so load, save, load is exact in float64.

Subcategories: a refined grammar names subcategory k of a symbol `NAME` as `NAME·k`
(`SUBCATEGORY_MARK`, U+00B7 middle dot, then the number). The mark is ours: no treebank tag set
uses it, and it differs from the marks of the corpus transforms (`corpus.transforms`: ¦, ˆ and
¤), so a refined symbol of a binarized or annotated tree keeps all of them apart, and it is an
ordinary character of a symbol token in the text format. `coarse_name` is the one reading of it.
Grammars saved before the mark changed wrote `NAME@k`; a loaded grammar whose symbols have that
form (`@` then a number, ending the name) reads them as `NAME·k` and says so once per file on
the `treewright` logger (standard error unless the caller configures logging).

A saved grammar is sealed: its first line is `@format 1` and its last line is
`# checksum sha256:HEX`, the SHA-256 of every line before it (joined with "\n", so a change of
line endings alone is not an edit). A file whose checksum no longer matches, or that has
`@format` but lost its checksum line (a truncated save), is refused. A hand-written file has
neither line and loads as it is; to accept hand edits to a saved file, delete both lines.
"""

from __future__ import annotations

import hashlib
import logging
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Sequence

import torch

from treewright.errors import InputError
from treewright.vocab import Vocabulary
from treewright.wordshapes import SCHEME as SHAPE_SCHEME

NEG_INF = float("-inf")
FORMAT_VERSION = 1
CHECKSUM_PREFIX = "# checksum sha256:"
SUBCATEGORY_MARK = "\u00b7"  # NAME·k: subcategory k of coarse symbol NAME (see the docstring)


def fine_name(symbol: str, k: int) -> str:
    """The name of subcategory k of `symbol`: `NP`, 1 -> `NP·1`."""
    return f"{symbol}{SUBCATEGORY_MARK}{k}"


def split_name(name: str) -> tuple[str, int | None]:
    """(coarse symbol, subcategory) of a symbol name: `NP·1` -> (`NP`, 1). A name without the
    mark followed by a number, such as `NP`, `NP·x` or `·1`, is its own coarse symbol and has
    no subcategory (None)."""
    head, mark, tail = name.rpartition(SUBCATEGORY_MARK)
    if mark and head and tail.isascii() and tail.isdigit():
        return head, int(tail)
    return name, None


OLD_SUBCATEGORY = re.compile(r"(.+)@([0-9]+)")  # NAME@k, the mark before SUBCATEGORY_MARK
_log = logging.getLogger("treewright")


def old_subcategory_names(names, source: str) -> dict[str, str]:
    """{old name: new name} for the symbols among `names` written `NAME@k`, the subcategory
    mark of grammars saved before `NAME·k`; when there are any, says once that they are read
    as subcategories. Raises InputError when a new name is already a symbol of its own."""
    names = set(names)
    renames = {}
    for name in sorted(names):
        found = OLD_SUBCATEGORY.fullmatch(name)
        if found:
            renames[name] = fine_name(found.group(1), int(found.group(2)))
    if not renames:
        return renames
    clash = sorted(set(renames.values()) & names)
    if clash:
        raise InputError(f"symbol {clash[0]} is written both in the old subcategory form "
                         f"(NAME@k) and in the new one (NAME{SUBCATEGORY_MARK}k)", path=source)
    example = next(iter(renames.items()))
    _log.warning("%s: %d symbols are written NAME@k, the subcategory mark of grammars saved "
                 "before NAME%sk; they are read as subcategories (%s as %s)", source,
                 len(renames), SUBCATEGORY_MARK, *example)
    return renames


def coarse_name(name: str) -> str:
    """The coarse symbol of a symbol name: `NP·1` -> `NP`, `NP` -> `NP` (see `split_name`)."""
    return split_name(name)[0]


@dataclass
class Grammar:
    nonterminals: list[str]
    preterminals: list[str]
    vocab: Vocabulary
    root: torch.Tensor     # (NT,) log-probs
    binary: torch.Tensor   # (NT, S, S) log-probs
    lexical: torch.Tensor  # (S, V) log-probs
    start: str = "ROOT"
    # {symbol: (discount a, concentration b)} of the Pitman-Yor adaptors of an adaptor grammar
    # (`@adapted` lines); empty for a plain PCFG, and nothing but `treewright.adaptor` reads it.
    adapted: dict[str, tuple[float, float]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        nt, s, v = len(self.nonterminals), self.num_symbols, len(self.vocab)
        assert self.root.shape == (nt,), self.root.shape
        assert self.binary.shape == (nt, s, s), self.binary.shape
        assert self.lexical.shape == (s, v), self.lexical.shape

    @property
    def num_symbols(self) -> int:
        return len(self.nonterminals) + len(self.preterminals)

    @property
    def symbols(self) -> list[str]:
        return self.nonterminals + self.preterminals

    @property
    def nonterminals_emit(self) -> bool:
        """True for general CNF, where some nonterminal also has lexical rules."""
        nt = len(self.nonterminals)
        return bool(torch.isfinite(self.lexical[:nt]).any())

    @property
    def root_is_symbol(self) -> bool:
        """True when the start symbol is itself a nonterminal (textbook S -> NP VP) rather than
        a separate symbol whose unary rules give the root distribution."""
        return self.start in self.nonterminals

    def to(self, dtype: torch.dtype) -> "Grammar":
        return Grammar(self.nonterminals, self.preterminals, self.vocab, self.root.to(dtype),
                       self.binary.to(dtype), self.lexical.to(dtype), self.start,
                       dict(self.adapted))

    def normalization_error(self) -> float:
        """Largest |1 - sum of probabilities| over all left-hand sides and the root."""
        nt = len(self.nonterminals)
        sums = [self.root.exp().sum().unsqueeze(0)]
        rows = self.binary.exp().flatten(1).sum(1) + self.lexical[:nt].exp().sum(1)
        sums.append(rows)
        sums.append(self.lexical[nt:].exp().sum(1))
        return float((torch.cat(sums) - 1).abs().max())

    # ---- the text format -------------------------------------------------------------------

    def to_text(self) -> str:
        """The grammar in the text format, sealed with `@format` and a checksum line."""
        binary = self.binary.double()

        def rows():
            for a in range(len(self.nonterminals)):
                b, c = torch.nonzero(torch.isfinite(binary[a])).unbind(1)
                yield b.tolist(), c.tolist(), binary[a, b, c].tolist()

        return rules_text(self.start, self.nonterminals, self.preterminals, self.vocab,
                          None if self.root_is_symbol else self.root, rows(),
                          self.lexical.double(), self.adapted)

    def save(self, path: str | Path) -> None:
        from treewright.safeio import atomic_write_text
        atomic_write_text(Path(path), self.to_text())


def rules_text(start: str, nonterminals: Sequence[str], preterminals: Sequence[str],
               vocab: Vocabulary, root: torch.Tensor | None, binary_rows: Iterable,
               lexical: torch.Tensor, adapted: dict[str, tuple[float, float]] | None = None
               ) -> str:
    """The text format, sealed with `@format` and a checksum line, from rules given without an
    (NT, S, S) tensor: `root` (NT,) log-probabilities of the rules start -> A (None when the
    start symbol is itself a nonterminal), `binary_rows` one (left ids, right ids,
    log-probabilities) triple of lists per nonterminal in order, its rules in row-major
    (B, C) order, and `lexical` (S, V) log-probabilities (-inf: no rule). `Grammar.to_text`
    writes through it, so a grammar written either way reads back the same."""
    lines = [f"@format {FORMAT_VERSION}", f"@start {start}"]
    if vocab.unk is not None:
        lines.append(f"@unknown {quote(vocab.unk)}")
    if vocab.shapes is not None:
        lines.append(f"@word-shapes {vocab.shapes}")
    for name, (discount, concentration) in (adapted or {}).items():
        lines.append(f"@adapted {name} discount {discount!r} concentration {concentration!r}")
    names = list(nonterminals) + list(preterminals)
    if root is not None:
        for a in range(len(nonterminals)):
            if root[a] > NEG_INF:
                lines.append(f"{start} -> {names[a]} {format_prob(root[a])}")
    rows = iter(binary_rows)
    for a, lhs in enumerate(names):
        if a < len(nonterminals):
            for b, c, logp in zip(*next(rows)):
                lines.append(f"{lhs} -> {names[b]} {names[c]} {format_prob(logp)}")
        for w in torch.nonzero(torch.isfinite(lexical[a])).flatten().tolist():
            lines.append(f"{lhs} -> {quote(vocab.words[w])} {format_prob(lexical[a, w])}")
    lines.append(CHECKSUM_PREFIX + _digest(lines))
    return "\n".join(lines) + "\n"


def format_prob(logp: torch.Tensor | float) -> str:
    return repr(math.exp(float(logp)))


def quote(word: str) -> str:
    return '"' + word.replace("\\", "\\\\").replace('"', '\\"') + '"'


_LINE_BREAK = re.compile(r"\r\n|\r|\n")
_TOKEN = re.compile(r'"(?:[^"\\]|\\.)*"|[^\s"]+')


def _digest(lines: list[str]) -> str:
    return hashlib.sha256("\n".join(lines).encode("utf-8")).hexdigest()


def _check_seal(lines: list[str], source: str) -> None:
    """Refuse a saved grammar that was edited or truncated (see the module docstring)."""
    accept = ("to accept the file as it is now, delete its '# checksum' line and its "
              "'@format' line")
    seals = [k for k, line in enumerate(lines) if line.startswith(CHECKSUM_PREFIX)]
    if not seals:
        for k, line in enumerate(lines):
            if line.split(None, 1)[:1] == ["@format"]:
                raise InputError("the grammar was saved by treewright ('@format') but its closing "
                                 "checksum line is missing: the file was truncated or the line "
                                 f"was removed; {accept}", path=source, line=k + 1)
        return
    k = seals[-1]
    if any(line.strip() for line in lines[k + 1:]):
        raise InputError("text follows the checksum line: the file was edited after it was "
                         f"saved; {accept}", path=source, line=k + 1)
    if lines[k][len(CHECKSUM_PREFIX):].strip() != _digest(lines[:k]):
        raise InputError("the grammar's checksum does not match its rules: the file was edited "
                         f"or truncated after it was saved; {accept}", path=source, line=k + 1)


def _unquote(token: str) -> str:
    return re.sub(r"\\(.)", r"\1", token[1:-1])


def load_grammar(path: str | Path, renormalize: bool = False, tolerance: float = 1e-6) -> Grammar:
    """Read a grammar file. Raises InputError naming the file and line for a malformed rule, a
    probability outside [0, 1], or a left-hand side whose probabilities do not sum to one
    (unless `renormalize`, which rescales each left-hand side instead)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("no such grammar file", path=str(path)) from None
    except UnicodeDecodeError as err:
        raise InputError(f"not UTF-8 text (byte {err.start})", path=str(path)) from None
    return parse_grammar(text, source=str(path), renormalize=renormalize, tolerance=tolerance)


def parse_grammar(text: str, source: str = "<string>", renormalize: bool = False,
                  tolerance: float = 1e-6) -> Grammar:
    start: str | None = None
    unk: str | None = None
    shapes: int | None = None
    adapted: dict[str, tuple[float, float, int]] = {}  # {symbol: (a, b, line)}
    # (lhs, rhs tuple, probability, line); rhs items are ("sym", name) or ("word", w)
    rules: list[tuple[str, tuple[tuple[str, str], ...], float, int]] = []
    # Only \n, \r\n and \r end a line (str.splitlines also splits at \v, \f and others, and
    # would number lines differently from an editor).
    lines = _LINE_BREAK.split(text.lstrip("\ufeff"))
    _check_seal(lines, source)
    for lineno, raw in enumerate(lines, start=1):
        line = _strip_comment(raw).strip()
        if not line:
            continue
        where = dict(path=source, line=lineno)
        if line.startswith("@"):
            parts = line.split(None, 1)
            if parts[0] == "@start" and len(parts) == 2 and _TOKEN.fullmatch(parts[1]) \
                    and not parts[1].startswith('"'):
                start = parts[1]
            elif parts[0] == "@unknown" and len(parts) == 2 and parts[1].startswith('"') \
                    and _TOKEN.fullmatch(parts[1]):
                unk = _unquote(parts[1])
            elif parts[0] == "@word-shapes" and len(parts) == 2:
                if parts[1].strip() != str(SHAPE_SCHEME):
                    raise InputError(f"word shape scheme {parts[1].strip()!r} is not supported "
                                     f"(this treewright has scheme {SHAPE_SCHEME})", **where)
                shapes = SHAPE_SCHEME
            elif parts[0] == "@adapted":
                name, discount, concentration = _adapted_line(parts[1:], raw, where)
                if name in adapted:
                    raise InputError(f"{name} is adapted twice (first on line "
                                     f"{adapted[name][2]})", **where)
                adapted[name] = (discount, concentration, lineno)
            elif parts[0] == "@format" and len(parts) == 2:
                if parts[1].strip() != str(FORMAT_VERSION):
                    raise InputError(f"grammar format version {parts[1].strip()!r} is not "
                                     f"supported (this treewright reads {FORMAT_VERSION})",
                                     **where)
            else:
                raise InputError(f"unknown or malformed directive {raw.strip()!r} "
                                 "(expected '@start SYMBOL', '@unknown \"WORD\"', "
                                 f"'@word-shapes {SHAPE_SCHEME}', '@adapted SYMBOL discount A "
                                 "concentration B' or '@format 1')", **where)
            continue
        tokens = _TOKEN.findall(line)
        # Well formed: the tokens cover every character but spaces. (Written as one pattern,
        # "tokens separated by optional spaces", a long run of characters before an unclosed
        # quote made the regex engine try every way of cutting the run: minutes per line.)
        if _TOKEN.sub("", line).strip() or len(tokens) < 4 or tokens[1] != "->":
            raise InputError(f"malformed rule {raw.strip()!r} "
                             "(expected 'LHS -> RHS probability')", **where)
        lhs, rhs_tokens, prob_text = tokens[0], tokens[2:-1], tokens[-1]
        if any(t.startswith("'") for t in rhs_tokens):
            raise InputError(f"malformed rule {raw.strip()!r}: terminals are written in double "
                             "quotes", **where)
        if lhs.startswith('"'):
            raise InputError("the left-hand side must be a symbol, not a quoted word", **where)
        try:
            prob = float(prob_text)
        except ValueError:
            raise InputError(f"the last item {prob_text!r} is not a probability", **where) from None
        if not (0.0 <= prob <= 1.0):  # also rejects NaN
            raise InputError(f"probability {prob_text} is outside [0, 1]", **where)
        rhs = tuple(("word", _unquote(t)) if t.startswith('"') else ("sym", t)
                    for t in rhs_tokens)
        kinds = [k for k, _ in rhs]
        if kinds not in (["word"], ["sym", "sym"], ["sym"]):
            raise InputError("a rule must be binary (A -> B C), lexical (A -> \"w\") or, from the "
                             "start symbol only, unary (START -> A)", **where)
        rules.append((lhs, rhs, prob, lineno))
    if start is None:
        raise InputError("the grammar declares no start symbol (add a line '@start SYMBOL')",
                         path=source)
    if not rules:
        raise InputError("the grammar has no rules", path=source)
    renames = old_subcategory_names([start] + [lhs for lhs, *_ in rules] + [
        name for _, rhs, _, _ in rules for kind, name in rhs if kind == "sym"], source)
    if renames:
        start = renames.get(start, start)
        adapted = {renames.get(name, name): spec for name, spec in adapted.items()}
        rules = [(renames.get(lhs, lhs),
                  tuple((kind, renames.get(name, name) if kind == "sym" else name)
                        for kind, name in rhs), prob, line) for lhs, rhs, prob, line in rules]
    grammar = _build(rules, start, unk, shapes, source, renormalize, tolerance)
    for name, (discount, concentration, line) in adapted.items():
        if name not in grammar.symbols:
            what = "has only the unary rules of the root distribution" if name == start \
                else "has no rules"
            raise InputError(f"the adapted symbol {name} {what}; an adapted symbol needs rules "
                             "of its own (they are its base distribution)", path=source,
                             line=line)
        grammar.adapted[name] = (discount, concentration)
    return grammar


def _adapted_line(words: list[str], raw: str, where: dict) -> tuple[str, float, float]:
    """(symbol, discount, concentration) of an '@adapted' line (its words after the
    directive); the Pitman-Yor process needs 0 <= a < 1 and b > -a (Pitman & Yor 1997)."""
    items = words[0].split() if words else []
    if len(items) != 5 or items[1] != "discount" or items[3] != "concentration" \
            or items[0].startswith('"'):
        raise InputError(f"malformed directive {raw.strip()!r} (expected '@adapted SYMBOL "
                         "discount A concentration B')", **where)
    try:
        discount, concentration = float(items[2]), float(items[4])
    except ValueError:
        raise InputError(f"malformed directive {raw.strip()!r}: discount and concentration "
                         "are numbers", **where) from None
    if not 0.0 <= discount < 1.0:  # also rejects NaN
        raise InputError(f"discount {items[2]} of {items[0]} is outside [0, 1)", **where)
    if not (concentration > -discount and math.isfinite(concentration)):
        raise InputError(f"concentration {items[4]} of {items[0]} must be finite and greater "
                         f"than minus the discount ({-discount!r})", **where)
    return items[0], discount, concentration


def _strip_comment(line: str) -> str:
    # A '#' inside a quoted terminal is part of the word.
    out, in_quote, escaped = [], False, False
    for ch in line:
        if in_quote:
            out.append(ch)
            if escaped:
                escaped = False
            elif ch == "\\":
                escaped = True
            elif ch == '"':
                in_quote = False
        elif ch == "#":
            break
        else:
            in_quote = ch == '"'
            out.append(ch)
    return "".join(out)


def _build(rules, start, unk, shapes, source, renormalize, tolerance) -> Grammar:
    first_line: dict[str, int] = {}
    has_binary, has_lexical, has_unary = set(), set(), set()
    words: dict[str, None] = {}
    for lhs, rhs, _, line in rules:
        first_line.setdefault(lhs, line)
        if rhs[0][0] == "word":
            has_lexical.add(lhs)
            words.setdefault(rhs[0][1])
        elif len(rhs) == 2:
            has_binary.add(lhs)
        else:
            has_unary.add(lhs)
            if lhs != start:
                raise InputError(f"unary rule from {lhs}: only the start symbol {start} may have "
                                 "unary rules (they give the root distribution)",
                                 path=source, line=line)
    root_is_symbol = start not in has_unary
    if not root_is_symbol and start in has_binary | has_lexical:
        raise InputError(f"the start symbol {start} has unary rules and other rules; give it "
                         "either unary rules to the top symbols or ordinary rules, not both",
                         path=source, line=first_line[start])
    nonterminals = sorted(has_binary, key=first_line.get)
    preterminals = sorted(has_lexical - has_binary, key=first_line.get)
    if root_is_symbol and start not in has_binary:
        if start in has_lexical:  # a one-word language: the start symbol only emits
            nonterminals.append(start)
            preterminals.remove(start)
        else:
            raise InputError(f"the start symbol {start} has no rules", path=source)
    names = nonterminals + preterminals
    index = {name: i for i, name in enumerate(names)}
    for lhs, rhs, _, line in rules:
        for kind, name in rhs:
            if kind == "sym" and name not in index:
                raise InputError(f"symbol {name} is used but has no rules of its own",
                                 path=source, line=line)
            if kind == "sym" and len(rhs) == 1 and name not in nonterminals:
                raise InputError(f"the start symbol may only rewrite to nonterminals (symbols "
                                 f"with binary rules); {name} has none", path=source, line=line)
    if unk is not None:
        words.setdefault(unk)
    vocab = Vocabulary(list(words), unk=unk, shapes=shapes)
    root: dict[str, float] = {}
    binary: dict[tuple[str, str, str], float] = {}
    lexical: dict[tuple[str, str], float] = {}
    seen: dict[tuple, int] = {}
    for lhs, rhs, prob, line in rules:
        key = (lhs,) + rhs
        if key in seen:
            raise InputError(f"rule repeated (first given on line {seen[key]})",
                             path=source, line=line)
        seen[key] = line
        if rhs[0][0] == "word":
            lexical[(lhs, rhs[0][1])] = prob
        elif len(rhs) == 2:
            binary[(lhs, rhs[0][1], rhs[1][1])] = prob
        else:
            root[rhs[0][1]] = prob

    def bad_total(name: str, total: float) -> InputError:
        return InputError(f"the rules of {name} sum to {total!r}, not 1 (pass renormalize "
                          "to rescale them)", path=source, line=first_line[name])

    grammar = build_grammar(nonterminals, preterminals, vocab, start, root, binary, lexical,
                            rescale=renormalize, tolerance=tolerance, bad_total=bad_total,
                            source=source)
    _check_productive(grammar, source)
    return grammar


def build_grammar(nonterminals: list[str], preterminals: list[str], vocab: Vocabulary,
                  start: str, root: dict[str, float], binary: dict[tuple[str, str, str], float],
                  lexical: dict[tuple[str, str], float], *, rescale: bool = False,
                  tolerance: float = 1e-6,
                  bad_total: Callable[[str, float], Exception] | None = None,
                  source: str | None = None) -> Grammar:
    """A `Grammar` from named rules and their weights: the one builder that the text format,
    the JSON export and the relative-frequency estimate all use, so that equal rules give
    equal bits whichever way they came in.

    root     {top nonterminal: weight}, the rules start -> A; ignored when `start` is itself a
             nonterminal (its trees have it on top, with probability one)
    binary   {(A, B, C): weight}, A -> B C, A a nonterminal
    lexical  {(X, word): weight}, X -> word, word in `vocab`

    Weights are filled into float64 tensors in the engine's layout (nonterminals first, then
    preterminals). Each left-hand side (the root distribution; a nonterminal's binary and
    lexical rules together) must sum to one within `tolerance`; one that does not is divided
    by its total when `rescale` (counts give the relative-frequency estimate this way), and
    otherwise, or when its total is zero, `bad_total(name, total)` is raised. A grammar whose
    (NT, S, S) rule tensor would not fit in the memory this machine has free is refused first
    (InputError naming `source`), rather than left to the system's out-of-memory killer.
    """
    names = nonterminals + preterminals
    index = {name: i for i, name in enumerate(names)}
    nt, s, v = len(nonterminals), len(names), len(vocab)
    check_room(nt, s, source)
    root_t = torch.zeros(nt, dtype=torch.float64)
    binary_t = torch.zeros(nt, s, s, dtype=torch.float64)
    lexical_t = torch.zeros(s, v, dtype=torch.float64)
    root_is_symbol = start in index
    if root_is_symbol:
        root_t[index[start]] = 1.0
    else:
        for a, weight in root.items():
            root_t[index[a]] = weight
    for (a, b, c), weight in binary.items():
        binary_t[index[a], index[b], index[c]] = weight
    for (x, word), weight in lexical.items():
        lexical_t[index[x], vocab.index[word]] = weight
    totals = {start: float(root_t.sum())} if not root_is_symbol else {}
    for name in names:
        i = index[name]
        totals[name] = float(lexical_t[i].sum()) + (float(binary_t[i].sum()) if i < nt else 0.0)
    for name, total in totals.items():
        if abs(total - 1.0) <= tolerance:
            continue
        if not rescale or total == 0.0:
            raise (bad_total or _default_bad_total)(name, total)
        if name == start and not root_is_symbol:
            root_t /= total
        else:
            i = index[name]
            lexical_t[i] /= total
            if i < nt:
                binary_t[i] /= total
    return Grammar(list(nonterminals), list(preterminals), vocab, root_t.log(), binary_t.log(),
                   lexical_t.log(), start)


RULE_TENSOR_COPIES = 3  # the (NT, S, S) float64 tensor is held about this many times as it is built


def available_bytes() -> int | None:
    """The memory the system can give without swapping (Linux's MemAvailable), or None where
    it does not say."""
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError):
        return None
    return None


def check_room(nt: int, s: int, source: str | None) -> None:
    """InputError when the binary rules of `nt` nonterminals over `s` symbols need more memory,
    as a dense float64 tensor held `RULE_TENSOR_COPIES` times, than the system has free."""
    need = RULE_TENSOR_COPIES * nt * s * s * 8
    free = available_bytes()
    if free is not None and need > free:
        raise InputError(
            f"the rules of {nt} nonterminals over {s} symbols load into an ({nt}, {s}, {s}) "
            f"tensor: about {need / 2 ** 30:,.1f} GiB as it is built, and this machine has "
            f"{free / 2 ** 30:,.1f} GiB free. For a training run of factored rules "
            "(model.parameterization independent or lowrank) that kept its last restart, "
            "`treewright parse RUN` and `treewright score RUN` read the run's model instead of "
            "this file", path=source)


def _default_bad_total(name: str, total: float) -> Exception:
    return InputError(f"the rules of {name} sum to {total!r}, not 1")


def _check_productive(grammar: Grammar, source: str) -> None:
    """Refuse a grammar in which no tree from the start symbol reaches words: such a grammar
    would give every sentence probability zero, which is never what the author meant."""
    nt = len(grammar.nonterminals)
    binary, lexical, root = grammar.binary.exp(), grammar.lexical.exp(), grammar.root.exp()
    productive = lexical.gt(0).any(1)  # (S,)
    while True:
        pairs = productive[:, None] & productive[None, :]
        grown = productive.clone()
        grown[:nt] |= (binary.gt(0) & pairs).flatten(1).any(1)
        if bool((grown == productive).all()):
            break
        productive = grown
    if not bool((root.gt(0) & productive[:nt]).any()):
        raise InputError("no tree from the start symbol ever reaches a word", path=source)
