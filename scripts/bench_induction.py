"""Benchmark of grammar induction quality (issue 12): induced trees against gold, beside the
branching baselines, over several seeds, on the Turkish web treebank and on the demo corpus.

    .venv/bin/python scripts/bench_induction.py --data demo --methods em,vb --seeds 0,1
    .venv/bin/python scripts/bench_induction.py --data turkish --mode tags --methods em \\
        --seeds 0,1 --epochs 10 --symbols 15,30 --max-length 15
    .venv/bin/python scripts/bench_induction.py --data head-final --methods em --symbols 20,30 \\
        --restarts 4 --epochs 60 --max-length 40 --seeds 0,1       # configs/induce.yaml's setup
    .venv/bin/python scripts/bench_induction.py --smoke          # seconds; checks the pipeline

Data. turkish: the `web` section of the Turkish Web Treebank (PyPI turkish-treebanks, CoNLL-U)
is split at random (seeded) into train (90%) and a dev split (10%); training sees only the
tokens of its train part (gold trees unused); the `wiki` section is the final test set, read
only for the last report. Punctuation (UPOS PUNCT) is removed before training and before
scoring, so model and gold see the same words. demo: the embedded invented-language corpus
(train.txt raw, dev.txt for restart selection, test.trees scored); its generating grammar gives
the ceiling of likelihood and trees. head-final, head-initial: raw text drawn afresh from a
generating grammar, no dev set (so the training likelihood picks the restart, as on a user's raw
text). head-final is the demo's own grammar (Kethravi: SOV, postpositions); head-initial is its
mirror, every binary rule's two children swapped (`mirror_grammar`), so every tree and sentence
is reversed with the same probability (SVO-like: prepositions, the final mark first). Training
sentences (`--train-sentences`, 5,000) and test sentences with their generating trees as gold
(`--test-sentences`) are drawn by `treewright.inference.generate` under `--data-seed`, so the
corpora are the same on every run; the generating grammar is the ceiling. Every restart's grammar
is scored too (`restarts` in results.json), so restart choice can be studied offline.
With `--selection S` the words of the drawn trees are drawn again so that every content word
depends on its head's word (`make_headed_language.select_words`: with probability S it takes
its head's word class), as words select their dependents in natural languages; the trees and
heads are those drawn without it, but the text is no longer the generating grammar's, so there
is no ceiling row.

Consensus of restarts. Every run with two or more restarts and one grammar for all sentences
(not compound or lexicalized) is also scored with the consensus decoder (`decode.consensus`:
tree averaging of the restarts' MBR trees, Shayegh et al. 2024, "Ensemble Distillation for
Unsupervised Constituency Parsing"), the kept restart first, as `treewright parse RUN --decoder
consensus` decodes: `consensus` per run in results.json, and a row "<method>, consensus of
restarts" in the tables (no perplexity: a consensus of trees has no likelihood of its own).

Modes. tokens: the model reads the word forms (lowercased for turkish); tags (turkish only): it
reads the gold UPOS in place of the words.

Each method is a config file configs/induce_<method>.yaml; the script adds the data paths, the
symbol counts, the seed and the epochs. Decoding is MBR over span posteriors for every method.
Metrics per evaluation set: unlabeled sentence-level and corpus-level F1 (trivial spans and the
whole-sentence span dropped, `BracketConventions` defaults), mean and sd over seeds, held-out
perplexity (the model's own vocabulary with its unknown token), and the share of predicted
spans that are left- or right-branching spans (span starts at 0 / ends at n): which way the
induced trees lean. Baselines (left, right, random, binary upper bound) on the same sentences.

Heads. The lexicalized row (the neural bilexicalized PCFG, Yang, Zhao & Tu 2021) is scored on
brackets as the others are, by MBR over its own span posteriors (heads summed out), with its own
log p(sentence) for perplexity. Where the gold has heads (turkish: the CoNLL-U HEAD column;
head-final, head-initial: the true heads of `scripts/make_headed_language.py`, from the head
mark of every phrase rule) its best derivation's heads (`decode.decode_heads`) are also scored
by directed, undirected and NED attachment (`evaluation.evaluate_attachment`, punctuation taken
out as for brackets) beside the left and right chains, in a second table per eval set. The
lexicalized model trains one restart (`--restarts` is for the other rows), for
`--lexicalized-epochs`. Its config is staged (configs/induce_lexicalized.yaml): it takes the
trees of the em row of the same seed (the consensus of its restarts) as partial brackets
(`constraints.brackets_from`), so asking for the lexicalized row runs the em row first and
reports it too, unless an `--override constraints.brackets_from=RUN` names the run to read. The
other rows and the bracket tables are as without it. With `--function-words SOURCE` each
lexicalized row is followed by a row "content heads": the same heads with the listed function
words made dependents of the content words of their phrases (`head_conventions.content_heads`,
as `treewright parse --function-words` writes them). SOURCE `known` takes the list from the
data's annotation, never read in training (`function_word_set`).

Prints a Markdown table and writes everything to <out>/results.json. Asserts nothing.
"""

from __future__ import annotations

import argparse
import datetime
import json
import math
import shutil
import statistics
import sys
import sysconfig
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import torch

from treewright.allocator import tune_allocator
from treewright import engine
from treewright.corpus import ReadOptions, length_batches, read_corpus, split_indices
from treewright.decode import barred_out, consensus, mbr_spans
from treewright.evaluation import BracketConventions, Bracketing, evaluate_brackets
from treewright.evaluation.dependencies import Dependencies, evaluate_attachment
from treewright.export import open_run_record
from treewright.grammar import load_grammar
from treewright.head_conventions import PUNCTUATION
from treewright.inference import encode
from treewright.runfolder import RunFolder
from treewright.train import load_train_config, train
from treewright.train.estep import compound_span_posteriors, make_batch
from treewright.word_pieces import held_at_end, piece_mask, sentence_barred

REPO = Path(__file__).resolve().parents[1]
CONFIGS = REPO / "configs"
METHODS = ("em", "vb", "gradient", "neural", "lowrank", "compound", "lexicalized",
           "independent")
# Rows scored from the trainer's model (per-sentence grammars, head words) rather than from the
# grammar files of their restarts, which hold no more than a shared symbol-only grammar.
MODEL_ROWS = ("compound", "lexicalized", "independent")
# Rows whose config takes partial brackets from an earlier run (constraints.brackets_from): the
# em row of the same seed, trained first in the same invocation.
STAGED = ("lexicalized",)
PUNCT_UPOS = "PUNCT"
BASELINES = ("left_branching", "right_branching", "random_binary", "binary_upper_bound")


# ---------------------------------------------------------------------------------------------
# Data


@dataclass
class EvalSet:
    """One scored set: what the model reads, and the gold spans over exactly those tokens.

    tokens: per sentence, the model's input (words or tags), punctuation already removed.
    gold: per sentence, a `Bracketing` whose words are `tokens`.
    dependencies: per sentence, the gold heads over its whole sentence, punctuation included
        with its tags (`evaluate_attachment` takes the punctuation out again), or None when the
        gold has no heads.
    barred: per sentence, the positions of `tokens` written joined to the token before
        (`word_pieces.barred_positions` of `piece_joins`, as training reads them), or None when
        the text marks no joins; a run that held the word-piece constraint to its end is decoded
        under it (`decode_pieces`).
    """
    name: str
    tokens: list[list[str]]
    gold: list[Bracketing]
    dependencies: list[Dependencies] | None = None
    barred: list[list[int]] | None = None


@dataclass
class Written:
    """One sentence as the trainer reads it from CoNLL-U: words, tags and joins, shape (n,)."""
    words: list[str]
    tags: list[str]
    joined: list[bool]


@dataclass
class BenchData:
    """Training and restart-selection text, the scored sets and the counts of what was used."""
    train_tokens: list[list[str]]
    dev_tokens: list[list[str]]
    evals: list[EvalSet]
    ceiling: Path | None = None          # generating grammar (demo, tokens mode only)
    counts: dict = field(default_factory=dict)
    # turkish: per training / dev sentence the written words (lowercased), their UPOS and which
    # are written joined to the word before (CoNLL-U SpaceAfter=No), punctuation removed
    train_written: list[Written] | None = None
    dev_written: list[Written] | None = None


def treebank_path(section: str) -> Path:
    """The CoNLL-U file of one section of the packaged Turkish treebank (web or wiki)."""
    path = Path(sysconfig.get_paths()["purelib"]) / "data" / f"{section}.conllu"
    if not path.exists():
        raise SystemExit(f"{path} not found; reinstall turkish-treebanks")
    return path


def clean_token(token: str) -> str:
    """A token safe for the one-sentence-per-line text format: inner whitespace becomes '_'."""
    return "_".join(token.split())


def without_punctuation(gold: Bracketing, tags: list[str], tokens: list[str]
                        ) -> tuple[list[str], Bracketing]:
    """Drop the words tagged PUNCT; return the model tokens left and the gold over them.

    gold: the sentence's bracketing (its words are the surface words, shape (n,)).
    tags, tokens: per word, shape (n,). The returned Bracketing has the kept tokens as words.
    """
    drop = [i for i, tag in enumerate(tags) if tag == PUNCT_UPOS]
    kept = gold.remove_words(drop)
    keep_tokens = [clean_token(t) for i, t in enumerate(tokens) if i not in set(drop)]
    return keep_tokens, Bracketing(tuple(keep_tokens), kept.spans, kept.tags)


def read_treebank(path: Path, mode: str, sentences: int | None = None
                  ) -> tuple[list[list[str]], list[Bracketing], dict, list[Written]]:
    """Every sentence of a CoNLL-U file as (model tokens, gold), punctuation removed, with its
    written words, tags and joins (what the trainer reads).

    Non-projective sentences are lifted (kept, counted) so no sentence is lost. Sentences left
    empty by punctuation removal are counted and dropped. `sentences` keeps the first ones.
    """
    corpus = read_corpus(path, "conllu", ReadOptions(nonprojective="lift"))
    tokens_out, gold_out, written = [], [], []
    empty = 0
    for s in corpus.sentences[:sentences]:
        source = s.tags if mode == "tags" else [w.lower() for w in s.words]
        tokens, gold = without_punctuation(Bracketing.from_tree(s.tree), list(s.tags), source)
        if not tokens:
            empty += 1
            continue
        tokens_out.append(tokens)
        gold_out.append(gold)
        keep = [t != PUNCT_UPOS for t in s.tags]
        # A removed word between two pieces breaks the join, as the trainer's reader does.
        joined = [j and i > 0 and keep[i - 1] for i, j in enumerate(s.joined) if keep[i]]
        written.append(Written([clean_token(w.lower()) for w, k in zip(s.words, keep) if k],
                               [t for t, k in zip(s.tags, keep) if k], joined))
    report = corpus.report
    counts = {"read": report.sentences_read, "used": len(tokens_out),
              "projectivised": report.projectivised, "empty_after_punctuation": empty,
              "skipped": dict(report.skipped_by_reason)}
    return tokens_out, gold_out, counts, written


def treebank_dependencies(path: Path, sentences: int | None = None) -> list[Dependencies]:
    """The gold heads of the sentences `read_treebank` keeps (same reading, same order): each
    sentence's words, HEAD column as written (not lifted) and UPOS."""
    corpus = read_corpus(path, "conllu", ReadOptions(nonprojective="lift"))
    return [Dependencies(tuple(s.words), tuple(s.heads), tuple(s.tags), s.line)
            for s in corpus.sentences[:sentences] if any(t != PUNCT_UPOS for t in s.tags)]


def turkish_data(mode: str, dev_fraction: float, eval_max_length: int | None,
                 sentences: int | None = None) -> BenchData:
    """web -> seeded train/dev split; wiki -> test. Eval sets keep sentences of at most
    `eval_max_length` tokens (None: all); the training length cap is applied by the trainer."""
    web_tokens, web_gold, web_counts, web_written = read_treebank(treebank_path("web"), mode,
                                                                  sentences)
    wiki_tokens, wiki_gold, wiki_counts, wiki_written = read_treebank(treebank_path("wiki"),
                                                                      mode, sentences)
    web_heads = treebank_dependencies(treebank_path("web"), sentences)
    wiki_heads = treebank_dependencies(treebank_path("wiki"), sentences)
    split = split_indices(len(web_tokens), dev=dev_fraction, test=0.0, seed=0)
    train_tokens = [web_tokens[i] for i in split.train]

    def capped(name, idx, tokens, gold, heads, written):
        keep = [i for i in idx if eval_max_length is None or len(tokens[i]) <= eval_max_length]
        return EvalSet(name, [tokens[i] for i in keep], [gold[i] for i in keep],
                       [heads[i] for i in keep],
                       [sentence_barred(written[i]) for i in keep])

    dev = capped("web-dev", split.dev, web_tokens, web_gold, web_heads, web_written)
    wiki = capped("wiki", range(len(wiki_tokens)), wiki_tokens, wiki_gold, wiki_heads,
                  wiki_written)
    counts = {"web": web_counts, "wiki": wiki_counts, "web_train": len(split.train),
              "web_dev": len(split.dev), "web_dev_scored": len(dev.tokens),
              "wiki_scored": len(wiki.tokens), "eval_max_length": eval_max_length}
    return BenchData(train_tokens, dev.tokens, [dev, wiki], None, counts,
                     [web_written[i] for i in split.train],
                     [web_written[i] for i in split.dev])


def demo_data(eval_max_length: int | None, sentences: int | None = None) -> BenchData:
    """The embedded invented-language corpus (tokens mode only: train.txt has no tags).
    Punctuation stays in the model's input, since the generating grammar emits it, and the
    scorer removes it by its PUNCT tag. `sentences` keeps the first training sentences."""
    from treewright.demo import demo_data_dir
    folder = demo_data_dir()
    train_c = read_corpus(folder / "train.txt", "text")
    dev_c = read_corpus(folder / "dev.txt", "text")
    test_c = read_corpus(folder / "test.trees", "brackets")
    # The length cap counts words after punctuation removal, as the scorer does.
    test = [s for s in test_c.sentences if eval_max_length is None
            or sum(t != PUNCT_UPOS for t in s.tags) <= eval_max_length]
    gold = []
    for s in test:
        b = Bracketing.from_tree(s.tree)
        gold.append(Bracketing(tuple(s.tokens), b.spans, b.tags))
    train_tokens = [list(s.tokens) for s in train_c.sentences[:sentences]]
    counts = {"train": len(train_tokens), "dev": len(dev_c.sentences),
              "test_read": len(test_c.sentences), "test_scored": len(test),
              "eval_max_length": eval_max_length}
    return BenchData(train_tokens, [list(s.tokens) for s in dev_c.sentences],
                     [EvalSet("demo-test", [list(s.tokens) for s in test], gold)],
                     folder / "grammar.pcfg", counts)


ORDERS = ("head-final", "head-initial")


def mirror_grammar(grammar):
    """The same grammar with the children of every binary rule swapped (A -> B C becomes
    A -> C B, same probability): each tree maps to its mirror image, so a sentence read
    backwards has the same probability under the mirror as the sentence under the original."""
    from treewright.grammar import Grammar
    return Grammar(grammar.nonterminals, grammar.preterminals, grammar.vocab, grammar.root,
                   grammar.binary.transpose(1, 2).contiguous(), grammar.lexical, grammar.start)


def generated_data(order: str, out: Path, train_size: int, test_size: int, max_words: int,
                   seed: int, selection: float = 0.0) -> BenchData:
    """Raw training text and gold test trees drawn from the demo grammar (head-final) or its
    mirror (head-initial); no dev set. The generating grammar is written to
    <out>/<order>.pcfg as the ceiling. Deterministic in `seed`. With `selection` > 0 the
    content words depend on their heads' words (`make_headed_language.select_words`): the
    trees are the same, the generating grammar is no longer the model of the text, and there
    is no ceiling."""
    from make_headed_language import draw_trees, order_grammar   # it imports this script
    grammar = order_grammar(order)
    ceiling = None
    if selection == 0:
        ceiling = out / f"{order}.pcfg"
        grammar.save(ceiling)
    trees = draw_trees(order, grammar, train_size + test_size, max_words, seed, selection)
    train_tokens = [t.leaves() for t in trees[:train_size]]
    test = trees[train_size:]
    gold = []
    for t in test:
        b = Bracketing.from_tree(t)
        gold.append(Bracketing(tuple(t.leaves()), b.spans, b.tags))
    counts = {"train": len(train_tokens), "dev": 0, "test_scored": len(test),
              "data_seed": seed, "max_words": max_words, "selection": selection}
    return BenchData(train_tokens, [], [EvalSet(f"{order}-test", [t.leaves() for t in test],
                                                gold, true_dependencies(order, test))],
                     ceiling, counts)


def true_dependencies(order: str, trees: list) -> list[Dependencies]:
    """The true heads of drawn trees, as `scripts/make_headed_language.py` writes them in its
    CoNLL-U (its `tree_heads`), with the preterminals as tags (the final mark is PUNCT)."""
    from make_headed_language import head_children, tree_heads   # it imports this script
    table = head_children(order)
    out = []
    for t in trees:
        tags = tuple(node.label for node in t.subtrees() if node.is_preterminal())
        out.append(Dependencies(tuple(t.leaves()), tuple(tree_heads(t, table)[0]), tags))
    return out


def function_word_set(source: str | None, name: str, mode: str, data: BenchData
                      ) -> frozenset[str] | None:
    """The function words of --function-words (None: not given), punctuation included
    (`head_conventions.read_function_words`). 'known' takes them from the data's own
    annotation, which training never reads: on the invented languages the words of the
    generating grammar's function tags (every tag but `make_headed_language.CONTENT_TAGS`); on
    Turkish tokens the training words whose gold UPOS is most often one of Universal
    Dependencies' function tags; on tags, those tags. SystemExit for a source that cannot
    apply."""
    from treewright.head_conventions import UD_FUNCTION, UD_FUNCTION_TAGS, read_function_words
    if source is None:
        return None
    if name == "demo":
        raise SystemExit("--function-words: the demo test set has no heads to score")
    if source == "known":
        if name in ORDERS:
            from make_demo_data import lexicon_entries
            from make_headed_language import CONTENT_TAGS   # it imports this script
            return frozenset(form for tag, entries in lexicon_entries().items()
                             if tag not in CONTENT_TAGS for form, _, _ in entries) | PUNCTUATION
        if mode == "tags":
            return frozenset(UD_FUNCTION_TAGS) | PUNCTUATION
        tags: dict[str, Counter] = {}
        for sentence in data.train_written or []:
            for word, tag in zip(sentence.words, sentence.tags):
                tags.setdefault(word, Counter())[tag] += 1
        return frozenset(word for word, seen in tags.items()
                         if seen.most_common(1)[0][0] in UD_FUNCTION_TAGS) | PUNCTUATION
    if source == UD_FUNCTION and mode != "tags":
        raise SystemExit(f"--function-words {UD_FUNCTION} names tags: use it with --mode tags")
    return read_function_words(source)


def write_text(path: Path, sentences: list[list[str]]) -> Path:
    path.write_text("".join(" ".join(s) + "\n" for s in sentences), encoding="utf-8")
    return path


def write_tokenized_conllu(path: Path, sentences: list[Written]) -> Path:
    """CoNLL-U without heads (text that is only tokenized): FORM, UPOS, and SpaceAfter=No
    where the next word is written joined to this one, so the trainer sees the written words."""
    lines = []
    for s in sentences:
        for k, (word, tag) in enumerate(zip(s.words, s.tags)):
            glued = k + 1 < len(s.words) and s.joined[k + 1]
            misc = "SpaceAfter=No" if glued else "_"
            lines.append(f"{k + 1}\t{word}\t_\t{tag}\t_\t_\t_\t_\t_\t{misc}")
        lines.append("")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


# ---------------------------------------------------------------------------------------------
# Scoring


def lean(pred: list[Bracketing], gold: list[Bracketing]) -> dict[str, float | None]:
    """Share of predicted spans (width >= 2, whole sentence excluded, after removing the words
    the gold tags as PUNCT) that start at word 0 (left-branching spans) or end at the last word
    (right-branching spans)."""
    left = right = total = 0
    for b, g in zip(pred, gold):
        drop = [i for i, tag in enumerate(g.tags or ()) if tag == PUNCT_UPOS]
        b = b.remove_words(drop)
        n = len(b.words)
        for i, j in b.unlabeled():
            if j - i < 2 or (i, j) == (0, n):
                continue
            total += 1
            left += i == 0
            right += j == n
    return {"left_share": left / total if total else None,
            "right_share": right / total if total else None}


def mbr_and_likelihood(grammar, sentences: list[list[str]], batch_size: int = 32,
                       pieces: tuple[str, list[list[int]]] | None = None
                       ) -> tuple[list[list[tuple[int, int]] | None], list[float]]:
    """Unlabeled MBR spans and log p(sentence) from one posterior pass per batch.

    The same trees as `decode(grammar, sentences, "mbr", pieces=pieces)` (span posteriors,
    `mbr_spans`) without the per-sentence label tables the benchmark does not need. Spans are
    None for a sentence the grammar cannot parse; log-probabilities are natural logs, -inf
    then. With `pieces` (host side, barred positions per sentence) the trees are those of the
    word-piece constraint, and log p(sentence) is still summed over every tree (one more
    inside pass for a batch with a barred position), so perplexity is the model's own. A
    sentence the constraint leaves no tree (a sparse grammar's) is decoded without it, as
    `treewright parse` decodes it.
    """
    spans: list = [None] * len(sentences)
    logprobs = [float("-inf")] * len(sentences)
    for batch in length_batches([len(s) for s in sentences], max_sentences=batch_size):
        enc = encode(grammar, [sentences[i] for i in batch], torch.float64)
        rules = (grammar.root.double(), grammar.binary.double(), enc.terminal, enc.lengths,
                 enc.nt_terminal)
        barred = None if pieces is None else [pieces[1][i] for i in batch]
        pot = piece_mask(pieces[0], barred, int(enc.lengths.max()), torch.float64) \
            if barred is not None and any(barred) else None
        post = engine.posteriors(*rules, span_pot=pot)
        logz = post.logz if pot is None else engine.log_partition(*rules)
        gains = barred_out(post.spans, pot)
        lost = torch.isfinite(logz) & ~torch.isfinite(post.logz)
        if bool(lost.any()):
            gains[lost] = engine.posteriors(*rules).spans[lost]
        for k, i in enumerate(batch):
            if math.isfinite(float(logz[k])):
                logprobs[i] = float(logz[k])
                spans[i] = mbr_spans(gains[k], len(sentences[i]))
    return spans, logprobs


def compound_mbr_and_likelihood(trainer, sentences: list[list[str]], batch_size: int = 32
                                ) -> tuple[list[list[tuple[int, int]] | None], list[float]]:
    """As `mbr_and_likelihood`, for a compound model: each sentence parsed with its grammar at
    the mean of q(z | x), and scored by the ELBO with z at that mean (a bound on log p, not
    log p itself)."""
    model, vocab = trainer.model, trainer.data.vocab
    spans: list = [None] * len(sentences)
    logprobs = [float("-inf")] * len(sentences)
    known = [i for i, s in enumerate(sentences) if -1 not in vocab.encode(s)]
    for part in length_batches([len(sentences[i]) for i in known], max_sentences=batch_size):
        group = [known[k] for k in part]
        batch = make_batch(group, [vocab.encode(s) for s in sentences], None, trainer.dtype)
        with torch.no_grad():
            rules = model.sentence_rules(batch.ids, batch.lengths)
        logz, marginals = compound_span_posteriors(rules, batch.ids, batch.lengths)
        for k, i in enumerate(group):
            if math.isfinite(float(logz[k])):
                logprobs[i] = float(logz[k] - rules.kl[k])
                spans[i] = mbr_spans(marginals[k], len(sentences[i]))
    return spans, logprobs


def model_mbr_and_likelihood(trainer, sentences: list[list[str]], batch_size: int = 32
                             ) -> tuple[list[list[tuple[int, int]] | None], list[float]]:
    """As `mbr_and_likelihood`, from the trainer's model through its own engine pass
    (`RuleModel.scorer`): for the independent row, whose grammar file holds only the most
    probable rules of each symbol and would be slow to decode densely. A sentence with a word
    the vocabulary cannot encode gets no spans and -inf."""
    model, vocab = trainer.model, trainer.data.vocab
    scorer = model.scorer()
    spans: list = [None] * len(sentences)
    logprobs = [float("-inf")] * len(sentences)
    known = [i for i, s in enumerate(sentences) if -1 not in vocab.encode(s)]
    for part in length_batches([len(sentences[i]) for i in known], max_sentences=batch_size):
        group = [known[k] for k in part]
        batch = make_batch(group, [vocab.encode(s) for s in sentences], None, trainer.dtype)
        logz, marginals = scorer.span_posteriors(batch.ids, batch.lengths)
        for k, i in enumerate(group):
            if math.isfinite(float(logz[k])):
                logprobs[i] = float(logz[k])
                spans[i] = mbr_spans(marginals[k], len(sentences[i]))
    return spans, logprobs


def score_lexicalized(trainer, ev: EvalSet, batch_size: int = 16,
                      function_words: frozenset[str] | None = None,
                      side: str | None = None) -> dict:
    """The lexicalized model's scores on one set: brackets by MBR over its own span posteriors
    (heads summed out) and perplexity from its own log p(sentence), as `score_spans` scores the
    other rows; with gold heads, `attachment` (model and both chains: directed, undirected,
    NED, words) from the heads of its best derivations, and `attachment_counts`; with
    `function_words` too, `attachment_content`: the model's scores with those heads in the
    content-head convention (`head_conventions.content_heads`, as `parse --function-words`
    writes them). With `side` (see `decode_pieces`) the trees and heads are those of the
    word-piece constraint, as `treewright parse` decodes them; perplexity stays the model's own,
    summed over every tree."""
    from treewright.decode import decode_heads, under_pieces
    from treewright.head_conventions import content_parse_heads
    from treewright.params import symbol_names
    model, vocab = trainer.model, trainer.data.vocab
    scorer = model.scorer()
    pieces = decode_pieces(side, ev)
    spans: list = [None] * len(ev.tokens)
    logprobs = [float("-inf")] * len(ev.tokens)
    encoded = [vocab.encode(s) for s in ev.tokens]
    known = [i for i, ids in enumerate(encoded) if -1 not in ids]
    for part in length_batches([len(ev.tokens[i]) for i in known], max_sentences=batch_size):
        group = [known[k] for k in part]
        batch = make_batch(group, encoded, None, trainer.dtype, pieces)
        logz, marginals = scorer.span_posteriors(batch.ids, batch.lengths)
        if batch.span_pot is not None:   # the trees under the constraint, log p over all
            held, constrained = scorer.span_posteriors(batch.ids, batch.lengths, batch.span_pot)
            lost = torch.isfinite(logz) & ~torch.isfinite(held)
            marginals = torch.where(lost[:, None, None], marginals,
                                    barred_out(constrained, batch.span_pot))
        for k, i in enumerate(group):
            if math.isfinite(float(logz[k])):
                logprobs[i] = float(logz[k])
                spans[i] = mbr_spans(marginals[k], len(ev.tokens[i]))
    scores = score_spans(spans, logprobs, ev)
    if ev.dependencies is not None:
        names = symbol_names(model.nonterminals, model.preterminals)
        parses, _ = under_pieces(
            lambda words, p: decode_heads(model, vocab, words, *names, batch_size=batch_size,
                                          pieces=p), ev.tokens, pieces)
        attachment = evaluate_attachment([p.heads or None for p in parses], ev.dependencies,
                                         BracketConventions())
        scores["attachment"] = attachment.to_dict()["systems"]
        scores["attachment_counts"] = attachment.counts
        if function_words is not None:
            content = evaluate_attachment(content_parse_heads(ev.tokens, parses, function_words),
                                          ev.dependencies, BracketConventions())
            scores["attachment_content"] = content.to_dict()["systems"]["model"]
    return scores


def load_scored_grammar(grammar_path: Path):
    # Rules written from float32 training can sum to 1 +- 1e-6, above the loader's default
    # tolerance; 1e-4 still rejects a grammar that is really unnormalised.
    return load_grammar(grammar_path, tolerance=1e-4)


def decode_pieces(side: str | None, ev: EvalSet) -> tuple[str, list[list[int]]] | None:
    """The word-piece constraint to decode `ev` under: the host side of a run that held it at
    its last epoch (`word_pieces.held_at_end`, as `treewright parse` decides for a CoNLL-U
    file), with the set's barred positions; None when either is missing."""
    return None if side is None or ev.barred is None else (side, ev.barred)


def score_grammar(grammar_path: Path, ev: EvalSet, side: str | None = None) -> dict:
    """MBR trees, bracket scores (model and baselines), lean and perplexity on one set; the
    trees under the word-piece constraint with `side` (see `decode_pieces`)."""
    grammar = load_scored_grammar(grammar_path)
    with torch.no_grad():
        spans, logprobs = mbr_and_likelihood(grammar, ev.tokens,
                                             pieces=decode_pieces(side, ev))
    return score_spans(spans, logprobs, ev)


def score_consensus(grammars: list, ev: EvalSet, batch_size: int = 32,
                    side: str | None = None) -> dict:
    """The consensus decoder's trees over `grammars` (the kept restart first) scored as
    `score_grammar` scores one grammar's, under the word-piece constraint with `side` (as
    there); perplexity None (the trees have no likelihood of their own) and `unparsed` the
    sentences no grammar parses."""
    with torch.no_grad():
        decoded = consensus(grammars, ev.tokens, batch_size, pieces=decode_pieces(side, ev))
    spans = [None if d.tree is None else
             [(i, j) for i, j, _ in d.tree.labeled_spans() if j - i >= 2] for d in decoded]
    scores = score_spans(spans, [d.log_likelihood for d in decoded], ev)
    scores["perplexity"] = None
    return scores


def score_spans(spans: list, logprobs: list[float], ev: EvalSet) -> dict:
    """Bracket scores (model and baselines), lean and perplexity of predicted spans."""
    # A sentence without a parse is scored as a flat tree (no brackets), never dropped.
    pred = [Bracketing.from_spans(t, s or []) for s, t in zip(spans, ev.tokens)]
    evaluation = evaluate_brackets(pred, ev.gold, BracketConventions())
    parsed = [(lp, len(t)) for lp, t in zip(logprobs, ev.tokens) if math.isfinite(lp)]
    # Perplexity over the parsed sentences (their count beside it), natural log.
    words = sum(n for _, n in parsed)
    perplexity = math.exp(-sum(lp for lp, _ in parsed) / words) if words else float("nan")
    systems = evaluation.to_dict()["systems"]
    return {"model": systems["model"], "baselines": {k: systems[k] for k in BASELINES},
            "lean": lean(pred, ev.gold), "perplexity": perplexity,
            "unparsed": len(ev.tokens) - len(parsed), "counts": evaluation.counts}


def gold_lean(ev: EvalSet) -> dict:
    return lean(ev.gold, ev.gold)


# ---------------------------------------------------------------------------------------------
# Runs


def run_one(method: str, seed: int, data_files: dict[str, Path], args, run_dir: Path) -> dict:
    """Train one (method, seed) and score it on every eval set."""
    nt, pt = {"lowrank": args.lowrank_symbols,
              "independent": args.independent_symbols}.get(method, args.symbols)
    dev = [f"data.dev={data_files['dev']}"] if "dev" in data_files else []
    staged = method in STAGED
    epochs = args.lexicalized_epochs if method == "lexicalized" else args.epochs
    overrides = [f"data.train={data_files['train']}", *dev, f"data.format={data_files['format']}",
                 f"data.tag_mode={str(args.mode == 'tags').lower()}", f"data.max_length={args.max_length}",
                 f"data.min_count={args.min_count}", f"model.nonterminals={nt}",
                 f"model.preterminals={pt}", f"train.seed={seed}",
                 f"train.epochs={epochs}",
                 f"train.restarts={1 if method in MODEL_ROWS else args.restarts}",
                 f"output.run_dir={run_dir}"]
    if staged and not args.brackets_given:
        overrides.append(f"constraints.brackets_from={run_dir.parent / f'em-seed{seed}'}")
    if args.max_vocab is not None:
        overrides.append(f"data.max_vocab={args.max_vocab}")
    overrides += args.override
    cfg = load_train_config(CONFIGS / f"induce_{method}.yaml", overrides)
    if run_dir.exists():
        # A fresh run every time: the benchmark's own folder from an earlier invocation.
        shutil.rmtree(run_dir)
    started = time.monotonic()
    with open(run_dir.parent / f"{run_dir.name}.log", "w", encoding="utf-8") as log:
        trainer = train(cfg, run_dir, stream=log, config_source=f"bench_induction {method}")
    seconds = time.monotonic() - started
    # The grammar-file rows and the lexicalized one are decoded as `treewright parse RUN`
    # decodes a CoNLL-U file: under the word-piece constraint when the run held it to its last
    # epoch. The compound and independent rows read models whose decoders do not apply it.
    side = None if method in ("compound", "independent") else \
        held_at_end(open_run_record(run_dir).training)
    restarts = []
    if method not in MODEL_ROWS:
        # Every restart's own grammar scored as the kept one is: for offline restart choice.
        for r in trainer.results_:
            path = RunFolder(run_dir).restart_grammar(r["restart"])
            restarts.append({**r, "scores": {ev.name: score_grammar(path, ev, side)
                                             for ev in args.evals}})
    agreed = None
    if len(restarts) >= 2:
        # The restarts as `treewright parse RUN --decoder consensus` reads them: kept first.
        order = sorted((r["restart"] for r in restarts),
                       key=lambda r: (r != trainer.best_restart_, r))
        grammars = [load_scored_grammar(RunFolder(run_dir).restart_grammar(r)) for r in order]
        agreed = {ev.name: score_consensus(grammars, ev, side=side) for ev in args.evals}
    return {"method": method, "seed": seed, "train_seconds": seconds,
            "best_restart": trainer.best_restart_, "overrides": overrides,
            "decoded_word_pieces": side, "restarts": restarts, "consensus": agreed,
            "scores": {ev.name: score_method(method, trainer, ev, args.function_words, side)
                       for ev in args.evals}}


def score_method(method: str, trainer, ev: EvalSet,
                 function_words: frozenset[str] | None = None, side: str | None = None) -> dict:
    """One trained run's scores on one set: from its grammar file (under the word-piece
    constraint with `side`), or from the trainer's model for the rows in MODEL_ROWS (the
    lexicalized one also in the content-head convention of `function_words`, when given)."""
    if method == "compound":
        return score_spans(*compound_mbr_and_likelihood(trainer, ev.tokens), ev)
    if method == "lexicalized":
        return score_lexicalized(trainer, ev, function_words=function_words, side=side)
    if method == "independent":
        return score_spans(*model_mbr_and_likelihood(trainer, ev.tokens), ev)
    return score_grammar(trainer.grammar_path_, ev, side)


def mean_sd(values: list[float | None]) -> tuple[float | None, float | None]:
    values = [v for v in values if v is not None and not math.isnan(v)]
    if not values:
        return None, None
    return statistics.fmean(values), statistics.stdev(values) if len(values) > 1 else 0.0


CONSENSUS_ROW = "{method}, consensus of restarts"


def summarise(runs: list[dict], evals: list[EvalSet]) -> dict:
    """Per method and eval set: mean and sd over seeds of F1, lean and perplexity; after a
    method, its consensus of restarts (`CONSENSUS_ROW`) over the runs that have one."""
    out: dict = {}
    rows = []
    for method in dict.fromkeys(r["method"] for r in runs):
        mine = [r for r in runs if r["method"] == method]
        rows.append((method, mine, "scores"))
        agreed = [r for r in mine if r.get("consensus")]
        if agreed:
            rows.append((CONSENSUS_ROW.format(method=method), agreed, "consensus"))
    for name, mine, key in rows:
        out[name] = {}
        for ev in evals:
            s = [r[key][ev.name] for r in mine]
            out[name][ev.name] = {
                "sentence_f1": mean_sd([x["model"]["sentence_f1"] for x in s]),
                "corpus_f1": mean_sd([x["model"]["corpus_f1"] for x in s]),
                "perplexity": mean_sd([x["perplexity"] for x in s]),
                "left_share": mean_sd([x["lean"]["left_share"] for x in s]),
                "right_share": mean_sd([x["lean"]["right_share"] for x in s]),
                "train_seconds": mean_sd([r["train_seconds"] for r in mine]),
                "seeds": [r["seed"] for r in mine]}
            if all("attachment" in x for x in s):   # only rows with heads get these keys
                for kind in ("directed", "undirected", "ned"):
                    out[name][ev.name][kind] = mean_sd([x["attachment"]["model"][kind]
                                                        for x in s])
            if all("attachment_content" in x for x in s):   # --function-words
                for kind in ("directed", "undirected", "ned"):
                    out[name][ev.name][f"content_{kind}"] = mean_sd(
                        [x["attachment_content"][kind] for x in s])
    return out


def _cell(pair, scale: float = 100.0, digits: int = 1) -> str:
    m, sd = pair
    if m is None:
        return "-"
    return f"{scale * m:.{digits}f} ± {scale * sd:.{digits}f}" if sd else f"{scale * m:.{digits}f}"


def markdown_table(summary: dict, baselines: dict, ceiling: dict, gold_leans: dict,
                   ev_name: str) -> str:
    """One Markdown table for one eval set: methods, then ceiling and baselines."""
    head = ("| system | sentence F1 | corpus F1 | perplexity | left / right span share "
            "| train s |\n|---|---|---|---|---|---|")
    rows = [head]
    for method, per in summary.items():
        e = per[ev_name]
        rows.append(f"| {method} | {_cell(e['sentence_f1'])} | {_cell(e['corpus_f1'])} | "
                    f"{_cell(e['perplexity'], 1.0)} | {_cell(e['left_share'], 1, 2)} / "
                    f"{_cell(e['right_share'], 1, 2)} | {_cell(e['train_seconds'], 1.0, 0)} |")
    if ev_name in ceiling:
        c = ceiling[ev_name]
        rows.append(f"| generating grammar (ceiling) | {100 * c['model']['sentence_f1']:.1f} | "
                    f"{100 * c['model']['corpus_f1']:.1f} | {c['perplexity']:.1f} | "
                    f"{c['lean']['left_share']:.2f} / {c['lean']['right_share']:.2f} | |")
    g = gold_leans[ev_name]
    names = {"left_branching": "left-branching", "right_branching": "right-branching",
             "random_binary": "random binary (10 draws)",
             "binary_upper_bound": "binary upper bound"}
    for key, title in names.items():
        b = baselines[ev_name][key]
        rows.append(f"| {title} | {100 * b['sentence_f1']:.1f} | {100 * b['corpus_f1']:.1f} "
                    f"| | | |")
    rows.append(f"| gold trees | | | | {g['left_share']:.2f} / {g['right_share']:.2f} | |")
    return "\n".join(rows)


CONTENT_ROW = "content heads"   # the attachment row of --function-words


def attachment_table(summary: dict, runs: list[dict], ev_name: str) -> str | None:
    """A Markdown table of attachment accuracy on one eval set: the rows with heads (each
    followed by its content-head row under --function-words), then the left and right chains
    (the same gold words for every run); None when no row has heads."""
    rows = [(method, per[ev_name]) for method, per in summary.items()
            if "directed" in per[ev_name]]
    if not rows:
        return None
    chains = next(r["scores"][ev_name]["attachment"] for r in runs
                  if "attachment" in r["scores"][ev_name])
    words = chains["model"]["words"]
    lines = [f"| system (attachment on {words} words) | directed | undirected | NED |",
             "|---|---|---|---|"]
    for method, e in rows:
        lines.append(f"| {method} | {_cell(e['directed'])} | {_cell(e['undirected'])} | "
                     f"{_cell(e['ned'])} |")
        if "content_directed" in e:   # --function-words
            lines.append(f"| {method}, {CONTENT_ROW} | {_cell(e['content_directed'])} | "
                         f"{_cell(e['content_undirected'])} | {_cell(e['content_ned'])} |")
    for key, title in (("left_chain", "left chain"), ("right_chain", "right chain")):
        c = chains[key]
        lines.append(f"| {title} | {100 * c['directed']:.1f} | {100 * c['undirected']:.1f} | "
                     f"{100 * c['ned']:.1f} |")
    return "\n".join(lines)


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter,
                                epilog="\n".join(__doc__.splitlines()[2:6]))
    p.add_argument("--data", choices=("demo", "turkish") + ORDERS, default="demo")
    p.add_argument("--train-sentences", type=int, default=5000, help="head-final, "
                   "head-initial: training sentences drawn")
    p.add_argument("--test-sentences", type=int, default=500, help="head-final, head-initial: "
                   "test sentences drawn (gold: their generating trees)")
    p.add_argument("--data-seed", type=int, default=0, help="head-final, head-initial: the "
                   "seed of the drawn corpora")
    p.add_argument("--selection", type=float, default=0.0, help="head-final, head-initial: "
                   "strength of lexical selection, the probability that a content word takes "
                   "its head's word class (scripts/make_headed_language.py; 0: every word "
                   "drawn from its tag alone, the generating grammar's own text)")
    p.add_argument("--mode", choices=("tokens", "tags"), default="tokens")
    p.add_argument("--methods", default="em", help=f"comma list of {', '.join(METHODS)}")
    p.add_argument("--seeds", default="0,1,2,3", help="comma list of train.seed values")
    p.add_argument("--epochs", type=int, default=20)
    p.add_argument("--restarts", type=int, default=1, help="restarts per seed, best dev "
                   "likelihood kept (compound and lexicalized: always 1)")
    p.add_argument("--lexicalized-epochs", type=int, default=None, help="epochs of the "
                   "lexicalized row (default: --epochs)")
    p.add_argument("--symbols", default=None, help="NONTERMINALS,PRETERMINALS (default: "
                   "30,60 on turkish, 10,20 on every other --data)")
    p.add_argument("--independent-symbols", default="256,512", help="NONTERMINALS,PRETERMINALS "
                   "of the independent row, which exists for many symbols (default 256,512: "
                   "1024,2048 trains too, in about 4 times the time, and scored lower on "
                   "every data set tried; see the README)")
    p.add_argument("--lowrank-symbols", default=None, help="NONTERMINALS,PRETERMINALS of the "
                   "lowrank row, which exists to afford many symbols (default: 4 times "
                   "--symbols)")
    p.add_argument("--max-length", type=int, default=15, help="training sentences longer "
                   "than this (tokens after punctuation removal) are set aside")
    p.add_argument("--eval-max-length", type=int, default=None, help="score only sentences "
                   "of at most this many tokens (default: all)")
    p.add_argument("--min-count", type=int, default=2, help="rarer tokens train the unknown "
                   "token, so unseen words parse")
    p.add_argument("--max-vocab", type=int, default=None)
    p.add_argument("--dev-fraction", type=float, default=0.1)
    p.add_argument("--function-words", metavar="SOURCE", default=None,
                   help="also score the lexicalized rows' heads in the content-head convention "
                        "(a row 'content heads'; head_conventions.content_heads): 'known' for "
                        "the data's own function words (see function_word_set), 'ud-function' "
                        "on tags, or a file of one word per line")
    p.add_argument("--override", action="append", default=[],
                   help="extra dotted config override for every run (repeatable)")
    p.add_argument("--out", type=Path, default=Path("runs/bench_induction"))
    p.add_argument("--threads", type=int, default=1, help="torch threads (shared machine: 1)")
    p.add_argument("--smoke", action="store_true", help="tiny demo run: 120 sentences, 2 "
                   "epochs, 4/6 symbols, one seed")
    args = p.parse_args(argv)
    if args.smoke:
        args.data, args.epochs, args.seeds, args.symbols = "demo", 2, "0", "4,6"
        args.eval_max_length, args.sentences = 8, 120
    else:
        args.sentences = None
    args.methods = [m for m in args.methods.split(",") if m]
    unknown = [m for m in args.methods if m not in METHODS]
    if unknown:
        p.error(f"unknown method(s) {', '.join(unknown)}; choose from {', '.join(METHODS)}")
    args.brackets_given = any(o.startswith("constraints.brackets_from=") for o in args.override)
    if any(m in STAGED for m in args.methods) and not args.brackets_given:
        # The staged rows read the em row's trees, so em runs first (and is reported too).
        args.methods = ["em"] + [m for m in args.methods if m != "em"]
    if args.lexicalized_epochs is None:
        args.lexicalized_epochs = args.epochs
    if args.data != "turkish" and args.mode == "tags":
        p.error("the invented-language corpora have no tags for their training text; use "
                "--mode tokens")
    args.seeds = [int(s) for s in args.seeds.split(",") if s]
    default_symbols = "30,60" if args.data == "turkish" else "10,20"
    args.symbols = tuple(int(x) for x in (args.symbols or default_symbols).split(","))
    args.independent_symbols = tuple(int(x) for x in args.independent_symbols.split(","))
    args.lowrank_symbols = tuple(int(x) for x in args.lowrank_symbols.split(",")) \
        if args.lowrank_symbols else tuple(4 * x for x in args.symbols)
    return args


def main(argv: list[str] | None = None) -> dict:
    args = parse_args(argv)
    tune_allocator()
    torch.set_num_threads(args.threads)
    args.out.mkdir(parents=True, exist_ok=True)
    if args.data == "turkish":
        data = turkish_data(args.mode, args.dev_fraction, args.eval_max_length, args.sentences)
    elif args.data in ORDERS:
        # Drawn sentences are at most --max-length tokens, so the trainer sets none aside.
        data = generated_data(args.data, args.out, args.train_sentences, args.test_sentences,
                              args.max_length, args.data_seed, args.selection)
    else:
        data = demo_data(args.eval_max_length, args.sentences)
    args.evals = data.evals
    args.function_words_source = args.function_words
    args.function_words = function_word_set(args.function_words, args.data, args.mode, data)
    if args.function_words is not None:
        listed = sorted(args.function_words - PUNCTUATION)
        print(f"function words ({args.function_words_source}): {len(listed)} besides "
              f"punctuation: {' '.join(listed[:40])}{' ...' if len(listed) > 40 else ''}",
              flush=True)
    if data.train_written is not None:
        # Turkish: the trainer reads the written words (or their tags, in tag mode) and where
        # the tokenizer split a written word (constraints.word_pieces).
        files = {"format": "conllu",
                 "train": write_tokenized_conllu(args.out / "train.conllu", data.train_written),
                 "dev": write_tokenized_conllu(args.out / "dev.conllu", data.dev_written)}
    else:
        files = {"format": "text", "train": write_text(args.out / "train.txt", data.train_tokens)}
        if data.dev_tokens:
            files["dev"] = write_text(args.out / "dev.txt", data.dev_tokens)
    started = datetime.datetime.now(datetime.timezone.utc)
    runs = []
    for method in args.methods:
        for seed in args.seeds:
            run_dir = args.out / f"{method}-seed{seed}"
            result = run_one(method, seed, files, args, run_dir)
            runs.append(result)
            brief = ", ".join(f"{name} F1 {100 * s['model']['sentence_f1']:.1f}"
                              for name, s in result["scores"].items())
            if result["restarts"]:
                per = " ".join(f"{100 * r['scores'][ev.name]['model']['sentence_f1']:.1f}"
                               for r in result["restarts"] for ev in data.evals[-1:])
                brief += f" (restarts: {per}; kept {result['best_restart']})"
            attached = [f"{name} directed {100 * s['attachment']['model']['directed']:.1f}"
                        + (f" ({CONTENT_ROW} {100 * s['attachment_content']['directed']:.1f})"
                           if "attachment_content" in s else "")
                        for name, s in result["scores"].items() if "attachment" in s]
            if attached:
                brief += "; " + ", ".join(attached)
            if result["consensus"]:
                brief += "; consensus " + ", ".join(
                    f"{name} F1 {100 * s['model']['sentence_f1']:.1f}"
                    for name, s in result["consensus"].items())
            print(f"{method} seed {seed}: {brief} ({result['train_seconds']:.0f} s)",
                  flush=True)
    baselines = {ev.name: score_baselines(ev) for ev in data.evals}
    ceiling = {ev.name: score_grammar(data.ceiling, ev) for ev in data.evals} \
        if data.ceiling is not None else {}
    gold_leans = {ev.name: gold_lean(ev) for ev in data.evals}
    summary = summarise(runs, data.evals)
    command = "scripts/bench_induction.py " + " ".join(sys.argv[1:] if argv is None else argv)
    tables = {ev.name: markdown_table(summary, baselines, ceiling, gold_leans, ev.name)
              for ev in data.evals}
    heads = {ev.name: attachment_table(summary, runs, ev.name) for ev in data.evals}
    heads = {name: table for name, table in heads.items() if table is not None}
    for name, table in tables.items():
        print(f"\n{name} ({args.data}, {args.mode} mode)\n\n{table}")
        if name in heads:
            print(f"\n{name}, attachment\n\n{heads[name]}")
    result = {"command": command, "date": started.isoformat(timespec="seconds"),
              "data": args.data, "mode": args.mode, "methods": args.methods,
              "seeds": args.seeds, "epochs": args.epochs, "restarts": args.restarts,
              "symbols": list(args.symbols), "lowrank_symbols": list(args.lowrank_symbols),
              "independent_symbols": list(args.independent_symbols),
              "max_length": args.max_length,
              "eval_max_length": args.eval_max_length, "counts": data.counts,
              "runs": runs, "summary": summary, "baselines": baselines, "ceiling": ceiling,
              "gold_lean": gold_leans, "tables": tables}
    if heads:   # only when a row has heads: the other rows' results are as before
        result["attachment_tables"] = heads
    if args.function_words is not None:
        result["function_words"] = {"source": args.function_words_source,
                                    "words": sorted(args.function_words - PUNCTUATION)}
    (args.out / "results.json").write_text(json.dumps(result, indent=2) + "\n",
                                           encoding="utf-8")
    print(f"\nwrote {args.out / 'results.json'}")
    return result


def score_baselines(ev: EvalSet) -> dict:
    systems = evaluate_brackets(None, ev.gold, BracketConventions()).to_dict()["systems"]
    return {k: systems[k] for k in BASELINES}


if __name__ == "__main__":
    main()
