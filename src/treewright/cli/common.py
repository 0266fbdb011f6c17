"""Small pieces shared by the command modules."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

from treewright.errors import InputError


def config_and_folder(args, load):
    """The run's config and folder, from `--resume RUN` or from a config file with overrides.

    With --resume the config is None: the run folder keeps its own, and a config file or
    overrides beside it would be ignored, so they are refused. `load(path, overrides)` reads a
    config file; its output.run_dir, else runs/<config name>, is the folder.
    """
    if args.resume is not None:
        if args.config is not None or args.overrides:
            raise InputError("--resume takes the config saved in the run folder; give no "
                             "config file or overrides with it")
        return None, Path(args.resume)
    if args.config is None:
        raise InputError("give a config file (or --resume RUN)")
    cfg = load(args.config, args.overrides)
    return cfg, cfg.output.run_dir or Path("runs") / Path(args.config).stem


def read_sentences(path: str, tags: bool = False) -> list[tuple[int, list[str]]]:
    """(line number, tokens) of every sentence of `path` ('-' reads stdin), as `read_lines`
    reads them, blank lines of raw text left out."""
    return [(k, words) for k, words in read_lines(path, tags) if words]


def read_lines(path: str, tags: bool = False) -> list[tuple[int, list[str]]]:
    """(line number, tokens) of every record of `path`, so that output can keep one line per
    record: every line of raw text ('-' reads stdin as raw text, and refuses CoNLL-U there),
    blank lines included with no tokens; each tree of a bracketed file and each sentence block
    of a CoNLL-U file (format by `corpus.detect_format`), numbered by its first line, with its
    words as evaluation reads gold (`corpus.read_records`), or with `tags` its tags
    (preterminals, UPOS).

    Lines are numbered as the corpus readers number them (\n, \r\n and a lone \r end a line),
    so a message about line k means the same line everywhere. Raises InputError when no line
    holds a word, or naming the file and line of a record that gives no sentence."""
    if path == "-":
        name = "<stdin>"
        text = sys.stdin.read().lstrip("\ufeff").replace("\r\n", "\n").replace("\r", "\n")
        numbered = list(enumerate(text.split("\n"), start=1))
        if text.endswith("\n"):
            numbered.pop()  # the empty "line" after a final newline is not a line of the input
        _check_raw_stdin(numbered)
    else:
        from treewright.corpus import ReadOptions, detect_format, iter_lines, read_records
        name = path
        if detect_format(path) != "text":
            return [(s.line, s.tokens) for s in read_records(path, options=ReadOptions(
                tag_mode=tags))]
        numbered = list(iter_lines(path))
    out = [(k, line.split()) for k, line in numbered]
    if not any(words for _, words in out):
        raise InputError("no sentences (the input is empty or blank)", path=name)
    return out


def _check_raw_stdin(numbered: list[tuple[int, str]]) -> None:
    """Standard input is read as raw text. Refuse CoNLL-U there (its word lines would become
    sentences of ids and columns), naming the line, and warn when the first line looks like a
    bracketed tree (a raw sentence may start with a parenthesis)."""
    from treewright.corpus.reader import starts_conllu_sentence
    first = next(((k, line) for k, line in numbered
                  if line.strip() and not line.startswith("#")), None)
    if first is None:
        return
    k, line = first
    if starts_conllu_sentence(line):
        raise InputError("this looks like a CoNLL-U word line; standard input is read as raw "
                         "text (one sentence per line), so give the CoNLL-U file's path "
                         "instead", path="<stdin>", line=k)
    stripped = line.strip()
    if stripped.startswith("(") and stripped.endswith(")") and \
            stripped.count("(") == stripped.count(")") >= 2:
        print(f"<stdin>, line {k}: this looks like a bracketed tree; standard input is read "
              "as raw text (one sentence per line, brackets as words), so give the file's "
              "path to read its trees", file=sys.stderr)


def trained_on_tags(source) -> bool:
    """True when the grammar's training run read tags (`data.tag_mode`); source: an
    `export.GrammarSource`."""
    from treewright.corpus import run_tag_mode
    config = (source.training or {}).get("config")
    return run_tag_mode(config.get("data") if isinstance(config, dict) else None)


def training_normaliser(source, note: bool = True):
    """How the grammar's training run normalised its words, as a function, or None.

    source: an `export.GrammarSource`. A run folder or JSON export records its training config;
    with `data.lowercase` the words were lowercased (by `data.case_rules`), and a note goes to
    standard error (unless `note` is false). A tag-mode run never lowercased its tokens (tags
    are case-significant), and a bare grammar file records nothing: for both the tokens are
    taken as written (None).
    """
    from treewright.corpus import lowercase, run_read_options
    config = (source.training or {}).get("config")
    options = run_read_options(config.get("data") if isinstance(config, dict) else None)
    if options.tag_mode or not options.lowercase:
        return None
    rules = options.case_rules
    if note:
        print("lowercasing the input words, as the grammar's training run did (data.lowercase, "
              f"{rules} case rules)", file=sys.stderr)
    return lambda word: lowercase(word, rules)


def as_trained(source, lines: list[tuple[int, list[str]]]) -> list[list[str]]:
    """The words of `lines` normalised as the grammar's training corpus was (see
    `training_normaliser`)."""
    normalise = training_normaliser(source)
    if normalise is None:
        return [words for _, words in lines]
    return [[normalise(w) for w in words] for _, words in lines]


def function_words_as_trained(spec: str, source, on_tags: bool) -> frozenset[str]:
    """--function-words of `parse` and `export`: the words `spec` lists
    (`head_conventions.read_function_words`: a file, or `ud-function` for the Universal
    Dependencies function tags), normalised as the grammar's training run normalised its words
    (lowercased by its case rules; tags never are), punctuation included. source: an
    `export.GrammarSource`; on_tags: the grammar reads tags. InputError for `ud-function` on a
    grammar trained on words."""
    from treewright.head_conventions import UD_FUNCTION, read_function_words
    if spec == UD_FUNCTION and not on_tags:
        raise InputError(f"--function-words {UD_FUNCTION} names Universal Dependencies tags, "
                         "but the grammar was trained on words: list the language's function "
                         "words in a file, one per line")
    words = read_function_words(spec)
    normalise = None if on_tags else training_normaliser(source, note=False)
    return words if normalise is None else frozenset(map(normalise, words))


def read_as_run_read(path: str, source) -> tuple[list[tuple[int, list[str]]],
                                                 list[list[str]]]:
    """The sentences of `path` as (line number, words) and the tokens the grammar of `source`
    (an `export.GrammarSource`) reads for them. Raw text and stdin are read by `read_sentences`
    and normalised by `as_trained`; a bracketed or CoNLL-U file is read as the grammar's
    training run read its corpus (`corpus.run_read_options`: lowercasing, tags in tag mode,
    and the words of `data.drop_tags` left out), as `evaluate --text` reads it."""
    from treewright.corpus import detect_format, read_records, run_read_options
    if path != "-" and detect_format(path) != "text":
        config = (source.training or {}).get("config")
        options = run_read_options(config.get("data") if isinstance(config, dict) else None)
        records = read_records(path, options=options)
        return [(s.line, list(s.words)) for s in records], [list(s.tokens) for s in records]
    lines = read_sentences(path, trained_on_tags(source))
    return lines, as_trained(source, lines)


def no_parse_reason(words: list[str], vocab, one_word_impossible: bool) -> str:
    """Why a sentence of `words` (as the grammar looks them up) has no tree under a grammar
    of vocabulary `vocab`: one word where `one_word_impossible` (no nonterminal emits a word),
    words the grammar does not have, words it reads as its unknown token (it may give that
    token no tree), or none of these."""
    if len(words) == 1 and one_word_impossible:
        return ("one word: the grammar has no rule for a one-word tree (its root rewrites to a "
                "nonterminal, and every nonterminal to two children)")
    unknown = [w for w in words if vocab.lookup(w) < 0]
    why = f"unknown words {unknown}" if unknown else "no tree covers it"
    as_unk = [w for w in words if vocab.unk is not None and w != vocab.unk
              and vocab.lookup(w) == vocab.unk_id]
    if as_unk and not unknown:
        why += f"; words read as the grammar's {vocab.unk}: {as_unk}"
    return why


def dumps(obj) -> str:
    """JSON with -inf/nan written as null (strict JSON has no infinities)."""
    def clean(x):
        if isinstance(x, float) and not math.isfinite(x):
            return None
        if isinstance(x, dict):
            return {k: clean(v) for k, v in x.items()}
        if isinstance(x, (list, tuple)):
            return [clean(v) for v in x]
        return x
    return json.dumps(clean(obj), ensure_ascii=False)


def input_name(path: str) -> str:
    """How messages name a text argument ('-' is standard input)."""
    return "<stdin>" if path == "-" else path


def warn_over_budget(plan, grammar, lines, path: str, dtype, what: str) -> None:
    """One line on standard error per sentence that `plan` (a `budget.BudgetPlan`) leaves out,
    naming the file and line and what it would need; `what` is the skipped work ("scored")."""
    from treewright.budget import MB, sentence_bytes

    for i in plan.over:
        line, words = lines[i]
        need = sentence_bytes(grammar, len(words), dtype) / MB
        print(f"{input_name(path)}, line {line}: not {what}: {len(words)} words need about "
              f"{need:,.0f} MB, over the memory budget of {plan.budget_mb:g} MB (sentences of "
              f"up to {plan.longest} words fit; --memory-budget MB changes it)", file=sys.stderr)


# treewright.budget.DEFAULT_BUDGET_MB, written out so that `--help` need not import torch
# (tests/test_cli_budget.py checks that the two agree).
DEFAULT_BUDGET_MB = 2048.0


def add_budget_argument(p) -> None:
    """The --memory-budget option of the commands that apply a grammar to text."""
    p.add_argument("--memory-budget", type=float, default=DEFAULT_BUDGET_MB, metavar="MB",
                   help=f"memory for one inside pass (default {DEFAULT_BUDGET_MB:g} MB, estimated "
                        "by treewright.engine.memory); a sentence that alone needs more is "
                        "named on standard error and kept as an unparsed line")


def shortest(value: float, dtype) -> float:
    """`value` with the digits its computing precision supports: a float32 result printed
    with 16 digits claims a precision it does not have. The shortest decimal that reads back
    as the same float32 (numpy's str) is kept; float64 values are left whole."""
    import numpy
    import torch

    if dtype != torch.float32 or not math.isfinite(value):
        return value
    return float(str(numpy.float32(value)))


# constraints.word_pieces' values, for the same constraint at decoding (`parse --word-pieces`).
PIECE_CHOICES = ("auto", "host-first", "host-last", "none")


def piece_side(word_pieces: str, decoder: str, source, records, own_model: bool
               ) -> str | None:
    """The host side ("first", "last") under which --word-pieces (`word_pieces`, one of
    `PIECE_CHOICES`) has `parse` or `export` decode with `decoder`, or None.
    auto: the side the run's training still held at its end (`word_pieces.held_at_end`);
    host-first, host-last: that side. None for --word-pieces none, for raw text (it marks no
    split words; a note says so when a side was asked for) and for the decoders of a run of
    factored rules, which read its model (a note, or InputError when a side was asked for)."""
    from treewright.word_pieces import held_at_end

    if word_pieces == "none":
        return None
    asked = word_pieces != "auto"
    side = word_pieces.removeprefix("host-") if asked else held_at_end(source.training)
    if side is None:
        return None
    why = (f"the {decoder} decoder reads the model itself and does not apply the "
           "word-piece constraint")
    if own_model and asked:
        raise InputError(f"--word-pieces {word_pieces}: {why}; use --decoder viterbi, "
                         "mbr, max-rule-product or consensus")
    if records is None:   # raw text: nothing to act on
        if asked:
            print(f"note: --word-pieces {word_pieces} has nothing to act on: raw text "
                  "does not mark the written words a tokenizer split (CoNLL-U does)",
                  file=sys.stderr)
        return None
    if own_model:
        print(f"note: the run trained under the word-piece constraint, but {why}",
              file=sys.stderr)
        return None
    return side
