"""treewright evaluate: bracket F1 of predicted trees, or attachment accuracy of predicted heads,
against gold, beside the baselines."""

from __future__ import annotations

import argparse

from treewright.cli.common import add_budget_argument

EXAMPLES = """examples:
  treewright parse runs/demo/grammar.pcfg dev.txt --decoder mbr > dev.pred
  treewright evaluate dev.pred dev.trees
  treewright evaluate dev.pred dev.conllu --json scores.json --max-length 10
  treewright evaluate dev.pred dev.trees --grammar runs/demo/grammar.pcfg --text test.txt
  treewright evaluate dev.heads.conllu dev.conllu --json heads.json

PRED holds one bracketed tree per line, as `treewright parse` writes them ('(NOPARSE ...)' lines
count as trees without brackets). GOLD holds bracketed trees or CoNLL-U (dependency subtrees
become the gold spans). The left-branching, right-branching, random and binary upper-bound trees
are always scored beside the model on the same sentences. Tags (many-to-one, V-measure) are
scored when both sides have preterminals/tags. Inputs that do not match stop with an error that
names the first mismatching line. --text is read as `treewright score` reads it (raw text: one
sentence per non-blank line; bracketed trees or CoNLL-U: each record's words). With --grammar
and --text, a text sentence too long for
--memory-budget is left out of the likelihood, and the table names its line. The run folder of
factored rules (model.parameterization independent, independent-neural or lowrank; the run kept
its last restart) scores the text with its model, as `treewright score` does (no budget).

Heads: when PRED is CoNLL-U (a .conllu/.conll file, or --pred-format conllu) its HEAD column is
scored against the HEAD column of CoNLL-U gold: directed, undirected and NED (neutral edge
direction: the gold head, a word the word heads, or its gold grandparent) attachment accuracy,
beside the left chain (each word's head is the word before it, the first word is the root) and
the right chain (the word after it; the last word is the root), on the same words. Punctuation
follows the bracket options (--keep-punctuation, --punctuation-tags, --punctuation-tokens): it
is taken out of both trees, so its words are not scored and a head that is punctuation passes
to the first word above it that is not. PRED may hold every gold word or only the words left
without punctuation. --max-length applies too; the other bracket options do not. A PRED block
whose HEAD is `_` throughout is a sentence without a parse: its words count wrong.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("pred", help="predicted bracketed trees, one per line; or CoNLL-U with "
                                "predicted heads")
    p.add_argument("--pred-format", choices=("auto", "brackets", "conllu"), default="auto",
                   help="auto: CoNLL-U for a .conllu/.conll file or one that starts with a "
                        "comment or tab-separated columns, else bracketed trees")
    p.add_argument("gold", help="gold trees: bracketed trees or CoNLL-U")
    p.add_argument("--gold-format", choices=("auto", "brackets", "conllu"), default="auto")
    p.add_argument("--json", metavar="PATH",
                   help="also write every score and convention as JSON ('-': stdout, no table)")
    p.add_argument("--grammar", help="grammar (text file, JSON export or run folder), for the held-out "
                        "likelihood of --text")
    p.add_argument("--text", help="held-out sentences scored under --grammar: raw text, one "
                                  "per line (blank lines hold none), or bracketed trees or "
                                  "CoNLL-U, one per tree or block")
    p.add_argument("--no-tags", action="store_true", help="skip the tag evaluation")
    add_budget_argument(p)
    conv = p.add_argument_group("bracket conventions (defaults: the usual unsupervised setup)")
    conv.add_argument("--include-whole-span", action="store_true",
                      help="count the whole-sentence span (default: not counted)")
    conv.add_argument("--keep-punctuation", action="store_true",
                      help="score punctuation words too (default: removed from both sides)")
    conv.add_argument("--punctuation-tags", metavar="T1,T2",
                      help="gold tags that mark punctuation (default: PUNCT and the Penn ones)")
    conv.add_argument("--punctuation-tokens", metavar="W1,W2",
                      help="punctuation tokens, used for gold sentences without tags")
    conv.add_argument("--max-length", type=int, metavar="N",
                      help="only sentences of at most N words after punctuation removal")
    conv.add_argument("--empty-sentences", choices=("skip", "one"), default="skip",
                      help="a sentence with no span on either side: leave out of the means "
                           "(skip) or count as F1 = 1 (one)")
    conv.add_argument("--labeled", choices=("auto", "yes", "no"), default="auto",
                      help="labeled scores; auto: when every predicted label is a gold label")
    conv.add_argument("--length-buckets", metavar="10,20,...", default="10,20,30,40",
                      help="upper edges of the sentence-length buckets")
    conv.add_argument("--random-draws", type=int, default=10,
                      help="draws averaged by the random baseline (default 10)")
    conv.add_argument("--random-seed", type=int, default=0)


def conventions_from_args(args):
    from treewright.errors import InputError
    from treewright.evaluation import BracketConventions

    def words(text):
        return frozenset(x for x in text.split(",") if x)

    try:
        buckets = tuple(int(x) for x in args.length_buckets.split(",") if x)
    except ValueError:
        raise InputError(f"--length-buckets wants integers like 10,20,30, not "
                         f"{args.length_buckets!r}") from None
    extra = {}
    if args.punctuation_tags is not None:
        extra["punctuation_tags"] = words(args.punctuation_tags)
    if args.punctuation_tokens is not None:
        extra["punctuation_tokens"] = words(args.punctuation_tokens)
    return BracketConventions(
        include_whole_span=args.include_whole_span, remove_punctuation=not args.keep_punctuation,
        max_length=args.max_length, empty_sentences=args.empty_sentences,
        labeled={"auto": None, "yes": True, "no": False}[args.labeled],
        length_buckets=buckets, random_draws=args.random_draws, random_seed=args.random_seed,
        **extra)


def run(args) -> int:
    from functools import partial

    from treewright.cli.common import dumps
    from treewright.errors import InputError
    from treewright.report.scoring import evaluate_files, evaluate_heads_files, prediction_format
    from treewright.safeio import write_output_text

    if (args.grammar is None) != (args.text is None):
        raise InputError("--grammar and --text go together (the text is scored under the grammar)")
    heads = args.pred_format == "conllu" or (args.pred_format == "auto"
                                             and prediction_format(args.pred) == "conllu")
    if heads and args.grammar is not None:
        raise InputError("--grammar and --text go with predicted trees; predicted heads are "
                         "scored alone", path=args.pred)
    if heads and args.gold_format == "brackets":
        raise InputError("predicted heads are scored against CoNLL-U gold, not bracketed trees",
                         path=args.gold)
    scorer = None
    if args.grammar is not None and not heads:
        from treewright.induce import load_factored
        from treewright.inference import score_rules
        factored = load_factored(args.grammar)  # a run of factored rules: its model scores
        if factored is not None:
            scorer = partial(score_rules, factored.rules, factored.vocab)
    report = evaluate_heads_files(args.pred, args.gold, conventions_from_args(args)) if heads \
        else evaluate_files(args.pred, args.gold, conventions_from_args(args),
                            gold_format=args.gold_format, grammar_path=args.grammar,
                            text_path=args.text, tags=not args.no_tags,
                            memory_budget_mb=args.memory_budget, scorer=scorer)
    text = dumps(report.to_dict())
    if args.json == "-":
        print(text)
        return 0
    print(report.format_table())
    if args.json is not None:
        write_output_text(args.json, text + "\n")
    return 0
