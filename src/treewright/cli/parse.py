"""treewright parse: one tree per sentence, by a chosen decoder."""

from __future__ import annotations

import argparse

from treewright.cli.common import PIECE_CHOICES, add_budget_argument
from treewright.corpus.batching import DECODE_BATCH

EXAMPLES = """examples:
  treewright parse src/treewright/data/examples/astronomers.pcfg sentences.txt
  treewright parse runs/demo/grammar.pcfg dev.txt --decoder mbr --scores
  treewright parse runs/demo dev.txt --decoder consensus
  echo "astronomers saw stars with ears" | treewright parse src/treewright/data/examples/astronomers.pcfg - --scores
  treewright parse runs/lexicalized_demo dev.conllu --heads-out dev.heads.conllu

decoders (default: consensus for a run folder that saved two or more restarts, mbr for the run
folder of factored rules (below), else viterbi):
  viterbi           the most probable tree
  mbr               the binary tree maximizing the summed posterior span marginals, each span
                    labeled with its most probable symbol (the usual decoder for induced grammars);
                    on the run folder of factored rules (model.parameterization independent,
                    independent-neural or lowrank; the run kept its last restart) it reads the
                    model from the checkpoint and decodes through its own engine pass in the
                    run's dtype, never loading grammar.pcfg into an (NT, S, S) rule tensor (the
                    training corpus must still be where the run's config points; the memory
                    budget does not apply)
  max-rule-product  for refined grammars (symbols NAME·k): the tree of coarse symbols maximizing
                    the product of posterior coarse-rule marginals; on the run folder of
                    factored rules it too reads the model and decodes through its engine pass
  consensus         GRAMMAR must be a run folder that saved two or more restarts: each restart's
                    mbr tree votes, and the binary tree with the largest summed F1 against those
                    trees is printed (tree averaging, Shayegh et al. 2024), labeled as mbr labels
                    it under the kept restart; words are read as the run read them
  lexicalized       GRAMMAR must be a lexicalized model's run folder (see Heads below): the mbr
                    tree of the model's own span posteriors, head words summed out (the trees
                    the induction benchmark scores for that model), labeled as mbr labels it
                    under the run's back-off grammar; with --scores, log p(tree, sentence) and
                    its posterior are nan (the model scores trees only with their heads)

A grammar trained on tags (data.tag_mode, or --tags) parses the tags of a bracketed or
CoNLL-U file and prints trees over its words, ready for `treewright evaluate` against that file;
given raw text, it reads the tokens as the tags.

One output line per input line (per tree or sentence for a bracketed or CoNLL-U file), always.
A blank or whitespace-only input line gives an empty output line. A sentence with no parse, or
too long for --memory-budget, prints '(NOPARSE w1 w2 ...)' and the reason goes to standard
error. On a terminal a progress bar runs on standard error. With --scores each line
gets a tab, log p(tree, sentence), a tab and p(tree | sentence) (for consensus under the kept
restart, or the first restart that parses the sentence); with --objective, a third tab and the
decoder's own objective (log p(tree), expected correct spans, log rule-posterior product, or for
consensus the mean F1 against the restarts' mbr trees); these are nan for a sentence over the
memory budget (not computed).

TEXT may be bracketed trees or CoNLL-U (format by extension and content, as training detects
it): each tree's words (empty elements removed, as `evaluate` reads gold) or each sentence
block's syntactic words are a sentence, one output line per tree or block, and a record that
gives no sentence stops with its file and line (a grammar trained on tags reads the tags
instead, as above).

Split written words: a tokenizer may split one written word into pieces (Turkish `kullanmaya`
into `kullan` + `maya`); CoNLL-U marks them (multiword tokens, SpaceAfter=No). Training on such
text keeps every bound piece with its host: no constituent takes the piece without the host
(constraints.word_pieces, treewright.word_pieces). With --word-pieces auto (the default), a
CoNLL-U TEXT parsed with a run folder or JSON export whose training still held that
constraint at its last epoch (on words by default; on tags only the first epochs) is decoded
under it too, and a note on standard error says so: viterbi, mbr, max-rule-product,
consensus and lexicalized (and the heads of --heads-out) then weigh only the trees that keep
each piece with its host, and with --scores the posterior is p(tree | sentence) among those
trees. host-first and host-last apply it to any grammar; none turns it off. Punctuation
written against a word is no piece of it, as in training. Raw text marks no split words, and
the decoders of a run of factored rules, which read its model, do not apply it.

Heads: with --heads-out PATH, GRAMMAR must be the run folder of a lexicalized model
(model.parameterization: lexicalized, train.restarts 1; its training corpus must still be where
its config points). The model's best derivation of each sentence gives the head of every word,
written to PATH as CoNLL-U with HEAD filled (0 for the root) and DEPREL `_`: from a CoNLL-U TEXT
every other line and column is kept as read; from raw text or bracketed trees the words are
written with every other column `_`. A sentence without a parse keeps HEAD `_`. Score the file
with `treewright evaluate PATH GOLD.conllu`. The trees printed are those of the decoder, as
without the option: the other decoders read the run's grammar.pcfg, the model's symbol-only
back-off grammar; --decoder lexicalized reads the model itself.

Function words: the model heads a phrase by whichever word best predicts its use, often the
function word that closes or opens it (an adposition, a determiner); Universal Dependencies
heads it by its content word. With --function-words SOURCE the heads are written in that
convention (head_conventions.content_heads): up the model's derivation, where a listed word
heads a phrase whose other part a content word heads, the content word heads it instead, and
the listed word depends on it. SOURCE is a file of the language's function words, one per line
(# comments; lowercased as the run's training text was), or 'ud-function', the function-word
tags of Universal Dependencies, for a run trained on tags. Punctuation always counts as listed.
"""


# The names of treewright.decode.DECODERS (one grammar), ENSEMBLE_DECODERS (a run's restart
# grammars) and MODEL_DECODERS (a lexicalized model), written out so that `--help` need not
# import torch (tests/test_cli_evaluate.py checks that they agree).
DECODER_NAMES = ("viterbi", "mbr", "max-rule-product", "consensus", "lexicalized")
# Sentences decoded together by default: `DECODE_BATCH` through a rule tensor (with the
# memory budget as the bound); factored rules (no budget plan: 1,024 nonterminals and more)
# and the lexicalized model keep 16.
MODEL_BATCH = 16
HEADS_CHUNK = 256  # sentences decoded between two updates of the progress bar
FACTORED_GROUP = 256  # the same, for a run of factored rules


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar", help="grammar: a grammar text file, a JSON export or a run folder")
    p.add_argument("text", help="raw text, one sentence per line ('-': stdin, raw text only); "
                                "or a file of bracketed trees or CoNLL-U, one sentence per tree "
                                "or block")
    p.add_argument("--decoder", choices=DECODER_NAMES, default=None,
                   help="how the tree is chosen (default: consensus for a run folder that "
                        "saved two or more restarts, mbr for a run of factored rules, else "
                        "viterbi; see below)")
    p.add_argument("--scores", action="store_true",
                   help="append the tree's log-probability and its posterior to each line")
    p.add_argument("--objective", action="store_true",
                   help="append the decoder's objective value to each line")
    p.add_argument("--batch-size", type=int, default=None,
                   help="sentences decoded together (default: %d through a grammar's rule "
                        "tensor, %d through factored rules or the lexicalized model; "
                        "--memory-budget splits them further)" % (DECODE_BATCH, MODEL_BATCH))
    p.add_argument("--tags", action="store_true",
                   help="the grammar reads tags: TEXT may be bracketed trees or CoNLL-U, whose "
                        "tags are parsed and whose words are printed (automatic for a run or "
                        "JSON export trained with data.tag_mode)")
    p.add_argument("--heads-out", metavar="PATH",
                   help="a lexicalized run folder only: also write CoNLL-U with the induced "
                        "head of every word to PATH (see below)")
    p.add_argument("--function-words", metavar="SOURCE",
                   help="with --heads-out: write the heads in the content-head convention of "
                        "Universal Dependencies, every listed function word a dependent of the "
                        "content word of its phrase; SOURCE is a file of one word per line, or "
                        "'ud-function' for a run trained on tags (see below)")
    p.add_argument("--word-pieces", choices=PIECE_CHOICES, default="auto",
                   help="written words that the tokenizer split into pieces (CoNLL-U TEXT): "
                        "auto keeps every bound piece with its host as the run's training did "
                        "at its end, host-first and host-last say which end holds the host, "
                        "none decodes without the constraint (see below)")
    add_budget_argument(p)


def run(args) -> int:
    import sys

    import torch

    from treewright.budget import BudgetPlan, plan_budget, run_plan_under_pieces
    from treewright.cli.common import (as_trained, function_words_as_trained, input_name,
                                       no_parse_reason, piece_side, read_lines,
                                       warn_over_budget)
    from treewright.corpus import (ReadOptions, detect_format, insert_words, joined_without,
                                   read_records, run_drop_tags, run_tag_mode)
    from treewright.decode import (ENSEMBLE_DECODERS, FACTORED_DECODERS, consensus, decode,
                                   decode_lexicalized, is_treebank_grammar,
                                   treebank_tree)
    from treewright.errors import InputError
    from treewright.export import (open_grammar, open_restart_grammars, open_run_record,
                                   saved_restarts)
    from treewright.tracking import terminal_progress
    from treewright.word_pieces import barred_positions, piece_joins

    if args.batch_size is not None and args.batch_size < 1:
        raise InputError(f"--batch-size must be at least 1, not {args.batch_size}")
    if args.function_words is not None and args.heads_out is None:
        raise InputError("--function-words changes the heads that --heads-out writes; give "
                         "--heads-out PATH too")
    dtype = torch.float64  # decode's precision
    factored = None
    # A run of factored rules decodes with mbr through its own model by default (unless it
    # saved several restarts): its grammar file may not even fit in memory as a rule tensor.
    if args.heads_out is None and (args.decoder in FACTORED_DECODERS or (
            args.decoder is None and saved_restarts(args.grammar) < 2)):
        from treewright.induce import load_factored
        factored = load_factored(args.grammar)  # None: not a run of factored rules
    if factored is not None:
        # Its own engine pass: the grammar file would load into the (NT, S, S) rule tensor.
        if args.decoder is None:
            args.decoder = "mbr"
            print("decoding with mbr through the run's own model (a run of factored rules; "
                  "--decoder max-rule-product also decodes through it, and the other "
                  "decoders read the grammar file)", file=sys.stderr)
        source = open_run_record(args.grammar)
        grammar, vocab = None, factored.vocab
    else:
        source = open_grammar(args.grammar)  # text, JSON export or run folder
        grammar, vocab = source.grammar, source.grammar.vocab
    lexicalized = None
    # Refused before any decoding when the model has no heads.
    wants = "--heads-out" if args.heads_out is not None else \
        "--decoder lexicalized" if args.decoder == "lexicalized" else None
    if wants is not None:
        from treewright.induce import load_lexicalized
        try:
            lexicalized = load_lexicalized(args.grammar)
        except InputError as err:
            raise InputError(f"{wants} needs a lexicalized model's run folder: "
                             f"{err.reason}", path=err.path, line=err.line) from None
    if args.decoder is None:
        # Tree averaging of a run's restarts beat the restart kept by likelihood on the induction
        # benchmark (docs/induction_notes.md), so a run with several restarts is read that way.
        args.decoder = "consensus" if saved_restarts(source) >= 2 else "viterbi"
    heads_batch = args.batch_size or MODEL_BATCH
    if args.batch_size is None:
        args.batch_size = MODEL_BATCH if factored is not None or \
            args.decoder == "lexicalized" else DECODE_BATCH
    if factored is not None:
        grammars = []

        def work(group, pieces):
            return factored.parse(group, args.batch_size, args.decoder)
    elif args.decoder == "lexicalized":   # the model itself, labels from its back-off grammar
        grammars = [grammar]

        def work(group, pieces):
            return decode_lexicalized(lexicalized.model, lexicalized.vocab, grammar, group,
                                      args.batch_size, pieces)
    elif args.decoder in ENSEMBLE_DECODERS:  # the run's restarts, the kept one first
        grammars = [s.grammar for s in open_restart_grammars(
            args.grammar, f"the {args.decoder} decoder")]

        def work(group, pieces):
            return consensus(grammars, group, args.batch_size, dtype, pieces)
    else:
        grammars = [grammar]

        def work(group, pieces):
            return decode(grammar, group, args.decoder, args.batch_size, dtype, pieces,
                          tree_logprobs=args.scores)
    config = (source.training or {}).get("config")
    data = config.get("data") if isinstance(config, dict) else None
    on_tags = args.tags or run_tag_mode(data)
    drop = run_drop_tags(data)
    fmt = "text" if args.text == "-" else detect_format(args.text)
    # Each tree or CoNLL-U block, as evaluation reads gold (read_lines reads them so too).
    records = None if fmt == "text" else read_records(args.text, fmt,
                                                      ReadOptions(tag_mode=on_tags))
    if records is None or not on_tags:  # raw text lines, or the words of each record
        every_line = read_lines(args.text) if records is None else \
            [(s.line, s.tokens) for s in records]
        lines = [(k, words) for k, words in every_line if words]
        # Tags (raw text read as tags) are never lowercased, as training read them.
        tokens = [words for _, words in lines] if on_tags else as_trained(source, lines)
    else:  # tags go into the grammar, the words come out; one output line per sentence
        every_line = lines = [(s.line, s.words) for s in records]
        tokens = [s.tokens for s in records]
    # Tags whose words training removed (data.drop_tags) are left out of the parse, as there,
    # and put back into the tree (insert_words); a dropped tag the grammar knows (training on
    # raw text removes none) stays in.
    kept = [[not (on_tags and t in drop and t not in vocab) for t in sentence]
            for sentence in tokens]
    inputs = [[t for t, k in zip(sentence, mask) if k] for sentence, mask in zip(tokens, kept)]
    todo = [i for i, sentence in enumerate(inputs) if sentence]
    dropped = next((i for i, mask in enumerate(kept) if not all(mask)), None)
    if args.heads_out is not None and dropped is not None:
        raise InputError("--heads-out: the run removed some tags' words (data.drop_tags), so "
                         "the model gives those words no head", path=args.text,
                         line=lines[dropped][0])
    function_words = None
    if args.function_words is not None:   # read before decoding, so its errors come first
        function_words = function_words_as_trained(args.function_words, source, on_tags)
    if factored is None:
        plan = plan_budget(grammars, [len(inputs[i]) for i in todo], args.memory_budget, dtype,
                           args.batch_size)
    else:  # no rule tensor to budget for; groups of sentences for the progress bar
        plan = BudgetPlan.unbudgeted([len(inputs[i]) for i in todo], FACTORED_GROUP)
    warn_over_budget(plan, grammar, [lines[i] for i in todo], args.text, dtype, "parsed")
    side = piece_side(args.word_pieces, args.decoder, source, records, factored is not None)
    barred = None if side is None else \
        [barred_positions(joined_without(piece_joins(s.words, s.joined, s.tags), keep,
                                         s.in_token)) for s, keep in zip(records, kept)]
    if barred is not None and any(barred):
        print(f"decoding under the word-piece constraint (the host comes {side}; split "
              f"written words in {sum(map(bool, barred))} of {len(barred)} sentences)"
              + ("; --word-pieces none decodes without it" if args.word_pieces == "auto"
                 else ""), file=sys.stderr)
    else:
        if barred is not None and args.word_pieces != "auto":
            print(f"note: --word-pieces {args.word_pieces} has nothing to act on: "
                  f"{input_name(args.text)} marks no split written words", file=sys.stderr)
        barred = None

    freed: list[int] = []  # positions in `todo` the constraint left no tree: decoded without
    with terminal_progress(len(todo) - len(plan.over), "parse") as progress:
        done = run_plan_under_pieces(
            plan, [inputs[i] for i in todo], work, progress,
            None if barred is None else (side, [barred[i] for i in todo]), freed)
    for i in sorted(todo[k] for k in freed):
        print(f"{input_name(args.text)}, line {lines[i][0]}: no tree keeps every piece of its "
              "split written words with the host; decoded without the word-piece constraint",
              file=sys.stderr)
    results = [None] * len(lines)
    for i, result in zip(todo, done):
        results[i] = result
    by_line = {line: i for i, (line, _) in enumerate(lines)}
    # In the induction layout (no nonterminal emits a word; factored rules always) every tree
    # covers two or more words. A lexicalized model's root may be a preterminal.
    one_word_impossible = args.decoder != "lexicalized" and \
        not any(g.nonterminals_emit for g in grammars)
    treebank = is_treebank_grammar(grammars)   # every tree of a treebank grammar written alike
    unparsed = 0
    for line, _ in every_line:
        if line not in by_line:
            print()  # a blank input line: an empty output line keeps the two files aligned
            continue
        i = by_line[line]
        words, result = lines[i][1], results[i]
        if result is None or result.tree is None:
            unparsed += 1
            why = None
            if not inputs[i]:
                why = f"every tag is one that training removed (data.drop_tags: {sorted(drop)})"
            elif result is not None:  # over the budget was reported already
                why = no_parse_reason(inputs[i], vocab, one_word_impossible)
                if drop and not on_tags and not why.startswith("one word"):
                    why += (f"; the grammar's training run removed the words tagged "
                            f"{', '.join(sorted(drop))} (data.drop_tags), and raw text has "
                            "no tags to find them by: remove such words from the text")
            if why is not None:
                print(f"{input_name(args.text)}, line {line}: no parse ({why})",
                      file=sys.stderr)
            fields = ["(NOPARSE " + " ".join(words) + ")"]
        elif all(kept[i]):
            # The words as written, in the treebank's form (a refined treebank grammar's
            # binarization and joined unary chains undone, as refinement scores its trees).
            fields = [treebank_tree(result.tree, treebank).with_leaves(words).to_string()]
        else:
            fields = [insert_words(treebank_tree(result.tree, treebank), words, kept[i],
                                   tokens[i]).to_string()]
        if args.scores:
            fields += ["nan", "nan"] if result is None else \
                [repr(result.tree_logprob), repr(result.posterior)]
        if args.objective:
            fields.append("nan" if result is None else repr(result.score))
        print("\t".join(fields))
    if unparsed:
        print(f"{unparsed} of {len(lines)} sentences had no parse", file=sys.stderr)
    if args.heads_out is not None:
        write_heads(args, lexicalized, fmt, lines, inputs, function_words,
                    None if barred is None else (side, barred), heads_batch)
    return 0


def write_heads(args, lexicalized, fmt: str, lines, inputs,
                function_words: frozenset[str] | None = None, pieces=None,
                batch_size: int = MODEL_BATCH) -> None:
    """--heads-out: the lexicalized model's heads of every sentence as CoNLL-U (see EXAMPLES),
    in the content-head convention when `function_words` is given (--function-words), and
    under the word-piece constraint with `pieces` (host side, barred positions per line of
    `lines`), as the trees are decoded."""
    import sys

    from treewright.cli.common import input_name
    from treewright.decode import under_pieces
    from treewright.export.heads import fill_heads_conllu, heads_to_conllu
    from treewright.head_conventions import PUNCTUATION, content_parse_heads
    from treewright.safeio import write_output_text
    from treewright.tracking import terminal_progress

    heads = []
    with terminal_progress(len(inputs), "heads") as progress:
        for start in range(0, len(inputs), HEADS_CHUNK):
            group = inputs[start:start + HEADS_CHUNK]
            parses, _ = under_pieces(lambda words, p: lexicalized.parse(words, batch_size, p),
                                     group, None if pieces is None else
                                     (pieces[0], pieces[1][start:start + HEADS_CHUNK]))
            if function_words is not None:
                heads += content_parse_heads(group, parses, function_words)
            else:   # [] from decode_heads: no parse, written as HEAD `_`
                heads += [p.heads or None for p in parses]
            progress.update(len(group))
    if function_words is not None:
        used = {w for sentence in inputs for w in sentence
                if w in function_words and w not in PUNCTUATION}
        print(f"content heads: {len(used)} of the listed function words occur in "
              f"{input_name(args.text)}" + ("" if used else ", so only punctuation moved"),
              file=sys.stderr)
    if fmt == "conllu":
        text = fill_heads_conllu(args.text, heads)
    else:
        text = heads_to_conllu([words for _, words in lines], heads)
    write_output_text(args.heads_out, text)
