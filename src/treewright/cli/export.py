"""treewright export: write a grammar (or a corpus parsed with it) in another format."""

from __future__ import annotations

import argparse

from treewright.cli.common import PIECE_CHOICES

FORMATS = ("text", "json", "listing", "brackets", "conllu")

EXAMPLES = """examples:
  treewright export runs/harbour --to json --out harbour.json
  treewright export runs/harbour --to text --out harbour.pcfg --prune-threshold 1e-4 \\
      --train train.txt --heldout dev.txt
  treewright export harbour.pcfg --to listing --out harbour.txt --corpus dev.txt --top 5
  treewright export harbour.pcfg --to conllu --corpus dev.txt --out dev.conllu --rename names.txt

formats:
  text      the grammar text format (loads back with identical scores)
  json      the JSON export: symbols, vocabulary, every rule, and the run's settings and data
            summary when the source is a run folder (see the README for its fields)
  listing   per symbol its entropy, top rules or words, and usage on --corpus if given
  brackets  the Viterbi tree of each --corpus sentence, one bracketed tree per line (an
            empty line for a blank input line, so output line k is input line k)
  conllu    the --corpus sentences as CoNLL-U, the induced preterminal of each word in the
            --tag-column column (XPOS by default), the tree in a '# induced_tree' comment,
            HEAD and DEPREL (root, else dep) read off the tree by the --heads rule; one
            block per non-blank line, its '# sent_id' the input line number. A CoNLL-U
            --corpus is written back line for line with those columns and comments filled
            in (its sent_id, text, multiword-token lines and other columns kept). From a
            lexicalized run folder (with --heads auto) the tree and heads are the model's
            own best derivation ('# head_rule = lexicalized model'). With
            --function-words SOURCE the heads are written in the content-head convention
            of Universal Dependencies, as `treewright parse --function-words` writes them
            (see its help; the head_rule comment adds ', function words as dependents')

A CoNLL-U --corpus is decoded under the word-piece constraint as `treewright parse` decodes it
(--word-pieces, the same choices; see its help): when the run held the constraint to its last
epoch, or as asked, the trees and heads keep every bound piece of a split written word with
its host.

The source is a grammar file (text or JSON) or a training run folder (its grammar.pcfg). A
segmentation run folder (treewright segment) exports as text (its segmentation, one input per
line) or json (the segmentation, and the reported chain's lexicon of cached units with their
customers and tables; fields in export/segmentation.py).
Pruning (--prune-threshold / --prune-top) comes first, then renaming (--rename: 'OLD NEW' per
line, '#' comments); the pruning report goes to standard error.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("source", help="grammar file (text or JSON export) or training run folder")
    p.add_argument("--to", required=True, choices=FORMATS, help="output format")
    p.add_argument("--out", required=True, help="output file ('-': standard output)")
    p.add_argument("--corpus", help="the sentences to parse (brackets, conllu) or to count usage "
                                    "on (listing): raw text, one sentence per line, or the "
                                    "words of each tree or CoNLL-U block")
    p.add_argument("--rename", metavar="FILE", help="symbol renaming file ('OLD NEW' per line)")
    p.add_argument("--threshold", type=float, default=None,
                   help="listing: show rules with at least this probability (default 0.01)")
    p.add_argument("--top", type=int, default=None,
                   help="listing: at most this many rules per symbol (default 10; 0: no cap)")
    p.add_argument("--tag-column", choices=("XPOS", "UPOS"), default="XPOS",
                   help="conllu: the column that carries the induced preterminal")
    p.add_argument("--heads", choices=("auto", "left", "right"), default="auto",
                   help="conllu: which child of each phrase holds its head word; auto (default) "
                        "takes, per symbol, the side whose child the grammar predicts better")
    p.add_argument("--function-words", metavar="SOURCE",
                   help="conllu: the listed function words depend on the content words of their "
                        "phrases (a file of one word per line, or 'ud-function' for a grammar "
                        "trained on tags)")
    p.add_argument("--word-pieces", choices=PIECE_CHOICES, default="auto",
                   help="brackets, conllu: decode a CoNLL-U --corpus under the word-piece "
                        "constraint, as `treewright parse --word-pieces` (auto: as the run's "
                        "training held it at its end)")
    p.add_argument("--prune-threshold", type=float, default=None,
                   help="drop rules below this probability and renormalise")
    p.add_argument("--prune-top", type=int, default=None,
                   help="keep at most this many rules per left-hand side and renormalise")
    p.add_argument("--train", help="pruning: training text whose Viterbi trees keep their rules")
    p.add_argument("--heldout", help="pruning: held-out text scored before and after")


def run(args) -> int:
    import sys

    from treewright.cli.common import (function_words_as_trained, input_name, no_parse_reason,
                                       read_lines, read_sentences, trained_on_tags,
                                       training_normaliser)
    from treewright.corpus import detect_format
    from treewright.decode import decode, under_pieces
    from treewright.errors import InputError
    from treewright.export import load_renaming, open_grammar, prune, rename_grammar
    from treewright.export.jsonformat import grammar_json_text
    from treewright.export.listing import (DEFAULT_THRESHOLD, DEFAULT_TOP, expected_counts,
                                           format_listing, summarize)
    from treewright.export.parses import (fill_parsed_conllu, head_rule, parse_corpus,
                                          to_brackets, to_conllu)
    from treewright.run_configs import is_segment_run
    from treewright.safeio import write_output_text

    if is_segment_run(args.source):
        return _segmentation(args)
    if args.to in ("brackets", "conllu") and args.corpus is None:
        raise InputError(f"--to {args.to} needs --corpus (the sentences to parse)")
    if args.function_words is not None and args.to != "conllu":
        raise InputError("--function-words changes the heads of --to conllu; no other format "
                         "writes heads")
    source = open_grammar(args.source)
    grammar = source.grammar
    function_words = None
    if args.function_words is not None:   # read before parsing, so its errors come first
        function_words = function_words_as_trained(args.function_words, source,
                                                   trained_on_tags(source))
    uses_text = args.corpus or ((args.prune_threshold is not None or args.prune_top is not None)
                                and (args.train or args.heldout))
    normalise = training_normaliser(source) if uses_text else None
    function = None if function_words is None else (   # a function word, once normalised?
        lambda word: (normalise(word) if normalise else word) in function_words)

    def sentences(path):
        return [[normalise(x) for x in w] if normalise else w for _, w in read_sentences(path)]

    if args.prune_threshold is not None or args.prune_top is not None:
        train = sentences(args.train) if args.train else None
        heldout = sentences(args.heldout) if args.heldout else None
        try:
            grammar, report = prune(grammar, args.prune_threshold or 0.0, args.prune_top,
                                    train, heldout)
        except ValueError as err:
            raise InputError(str(err)) from None
        print(report.format(), file=sys.stderr)
    mapping = load_renaming(args.rename, grammar) if args.rename else {}
    named = rename_grammar(grammar, mapping)
    lines = read_sentences(args.corpus) if args.corpus else None
    every_line = read_lines(args.corpus) if args.to in ("brackets", "conllu") else None

    if args.to == "json":
        text = grammar_json_text(named, source.training)
    elif args.to == "text":
        text = named.to_text()
    elif args.to == "listing":
        threshold = DEFAULT_THRESHOLD if args.threshold is None else args.threshold
        top = DEFAULT_TOP if args.top is None else (args.top or None)
        counts = expected_counts(grammar, sentences(args.corpus)) if lines else None
        note = None if counts is None else (
            f"expected counts over {counts.sentences} sentences of {args.corpus} "
            f"({counts.unparsed} without a parse)")
        text = format_listing(named, summarize(named, counts, threshold, top), threshold, top,
                              note)
    else:
        lexicalized = _lexicalized(args) if args.to == "conllu" else None
        pieces = _corpus_pieces(args, source, lexicalized is not None)

        def best(words: list[list[str]]) -> list:   # the parses under the constraint
            if lexicalized is None:
                parses, _ = under_pieces(lambda w, p: decode(grammar, w, "viterbi", pieces=p),
                                         words, pieces)
                return [(d.tree, d.tree_logprob, None) for d in parses]
            parses, _ = under_pieces(lambda w, p: lexicalized.parse(w, pieces=p), words, pieces)
            return [(p.tree, p.score, p.heads if p.tree is not None else None) for p in parses]

        decoder = best if lexicalized is not None or pieces is not None else None
        parsed = parse_corpus(grammar, every_line, mapping, normalise, decoder)
        unparsed = [p for p in parsed if p.tree is None and not p.blank]
        vocab = grammar.vocab if lexicalized is None else lexicalized.vocab
        for p in unparsed:
            looked_up = [normalise(w) for w in p.words] if normalise else p.words
            why = no_parse_reason(looked_up, vocab, lexicalized is None and
                                  not grammar.nonterminals_emit)
            print(f"{input_name(args.corpus)}, line {p.line}: no parse ({why})",
                  file=sys.stderr)
        if unparsed:
            print(f"{len(unparsed)} of {len(lines)} sentences had no parse (kept in the "
                  "output)", file=sys.stderr)
        blanks = len(parsed) - len(lines)
        if blanks and args.to == "conllu":
            print(f"{blanks} blank lines have no CoNLL-U block (a sentence needs a word); each "
                  "block's '# sent_id' is its input line", file=sys.stderr)
        if args.to == "brackets":
            text = to_brackets(parsed)
        elif detect_format(args.corpus) == "conllu":
            # The input's own lines, with the induced columns and comments filled in.
            text = fill_parsed_conllu(args.corpus, parsed, args.tag_column,
                                      rule=head_rule(args.heads, named), function=function)
        else:
            text = to_conllu(parsed, args.tag_column, rule=head_rule(args.heads, named),
                             function=function)
    if args.out == "-":
        sys.stdout.write(text)
    else:
        write_output_text(args.out, text)
    return 0


def _corpus_pieces(args, source, lexicalized: bool):
    """(host side, barred positions per sentence) of a CoNLL-U --corpus under --word-pieces
    (`cli.common.piece_side`), as training read its joins (`word_pieces.piece_joins`), or None;
    a note on standard error when it applies."""
    import sys

    from treewright.cli.common import piece_side
    from treewright.corpus import detect_format, read_records
    from treewright.word_pieces import sentence_barred

    records = None if args.corpus == "-" or detect_format(args.corpus) == "text" else \
        read_records(args.corpus)
    side = piece_side(args.word_pieces, "lexicalized" if lexicalized else "viterbi", source,
                      records, False)
    if side is None:
        return None
    barred = [sentence_barred(s) for s in records]
    if not any(barred):
        if args.word_pieces != "auto":
            print(f"note: --word-pieces {args.word_pieces} has nothing to act on: "
                  f"{args.corpus} marks no split written words", file=sys.stderr)
        return None
    print(f"decoding under the word-piece constraint (the host comes {side}; split written "
          f"words in {sum(map(bool, barred))} of {len(barred)} sentences)", file=sys.stderr)
    return side, barred


def _lexicalized(args):
    """The lexicalized model of a run folder whose heads --to conllu writes (--heads auto, the
    default), else None."""
    from treewright.induce import load_lexicalized, saved_config
    from treewright.run_configs import config_kind
    from treewright.runfolder import RunFolder

    config = RunFolder(args.source).config
    if args.heads != "auto" or not config.is_file() or config_kind(config) != "train" or \
            saved_config(args.source).model.parameterization != "lexicalized":
        return None
    return load_lexicalized(args.source)


def _segmentation(args) -> int:
    """A segmentation run: its segmentation (text) or everything it found (json)."""
    import sys

    from treewright.errors import InputError
    from treewright.export.segmentation import segmentation_json_text
    from treewright.runfolder import RunFolder
    from treewright.safeio import write_output_text

    if args.to not in ("json", "text"):
        raise InputError(f"--to {args.to}: a segmentation run exports as json (segmentation "
                         "and lexicon) or text (the segmentation)", path=args.source)
    text = segmentation_json_text(args.source)  # checks the run is finished
    if args.to == "text":
        text = RunFolder(args.source, "segment").segmentation.read_text(encoding="utf-8")
    if args.out == "-":
        sys.stdout.write(text)
    else:
        write_output_text(args.out, text)
    return 0
