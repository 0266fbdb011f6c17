"""Study (issue 22): does the lexicalized model's likelihood prefer a treebank's own heads?

    .venv/bin/python scripts/make_headed_language.py --out runs/heads --selection 0.8
    OMP_NUM_THREADS=1 .venv/bin/python scripts/study_head_likelihood.py \\
        runs/heads/head-final/train.conllu runs/heads/head-final/test.conllu --out runs/study.json

When induced heads disagree with the gold, either the search missed heads that the model would
score higher (a search problem: better starts or restarts would help), or the model itself
scores other heads higher on this text (a model problem: no search will find the gold). This
script tells the two apart. It trains the neural bilexicalized PCFG (Yang, Zhao & Tu 2021;
`params.lexicalized`) twice on the same training sentences from the same start, with the same
batches:

- `free`: each sentence's constituents restricted to those its gold dependency tree allows
  (the yields of a head with some of its dependents' whole subtrees, contiguous: the
  constituents of every binary tree whose heads are the gold ones), the head of each
  constituent left to the model;
- `gold`: the same constituents, each headed by that one word (the gold heads).

Training maximizes the likelihood summed over what each condition allows, by gradient steps
(Adam, batches of 16 sentences of similar length, linear warm-up over 20 updates and a cosine
decay, as `configs/induce_lexicalized.yaml` trains, but without its `bias.arc_length`: the
question is what the likelihood alone prefers). Then, on the test sentences, each model is
scored with nothing fixed: log p(sentence) per word (the model's own likelihood, heads and
trees summed out) and the directed, undirected and NED attachment of its best derivation's heads
(`evaluation.evaluate_attachment`, punctuation out as `treewright evaluate` takes it out). If
`free` both scores the higher likelihood and gets the heads wrong, the model prefers other
heads: the search is not to blame. The converse does not follow: when the gold-trained model
is the more likely, the free training may only have stopped in a poor optimum, and a better
search (`--anneal-from`) can find other heads more likely still (docs/lexicalized_notes.md).

`--anneal-from B --anneal-epochs K` trains by deterministic annealing (Smith & Eisner 2004):
each update follows the posterior proportional to p(d)^beta (tree, heads and latent classes;
`LexicalizedFactors.tempered`), beta rising linearly from B to 1 over the first K epochs, a
search that keeps the head choices open longer. The training curve of those epochs reports
(1/beta) log sum_d p(d)^beta; the held-out scores are untempered.

Non-projective gold trees are lifted to projective ones (`corpus.lift_to_projective`) and
counted. A test word outside the training vocabulary (which keeps words seen twice or more)
reads as the unknown word. The figures are printed and, with --out, written as JSON; nothing
is asserted.
"""

from __future__ import annotations

import argparse
import json
import math
import random
import sys
import time
from collections import Counter
from pathlib import Path

import torch

from treewright.corpus import ReadOptions, length_batches, lift_to_projective, read_corpus
from treewright.engine.lexicalized import lexicalized_log_partition
from treewright.evaluation import Dependencies, evaluate_attachment
from treewright.inference import pad_ids
from treewright.params.lexicalized import LexicalizedParams
from treewright.train.schedule import learning_rate
from treewright.vocab import Vocabulary

CONDITIONS = ("free", "gold")


def read_heads(path: Path, tags: bool = False) -> tuple[list[Dependencies], int]:
    """The sentences of a CoNLL-U file with their heads (lifted where non-projective), and how
    many were lifted; with `tags`, the UPOS column stands in for the words."""
    corpus = read_corpus(path, "conllu", ReadOptions(nonprojective="lift"))
    out, lifted = [], 0
    for s in corpus.sentences:
        heads = lift_to_projective(list(s.heads))
        lifted += heads != list(s.heads)
        out.append(Dependencies(tuple(s.tags if tags else s.words), tuple(heads), tuple(s.tags),
                                s.line))
    return out, lifted


def allowed_heads(heads: tuple[int, ...]) -> dict[tuple[int, int], int]:
    """(start, end) -> head (0-based) of every span of two or more words that some binary tree
    consistent with the projective dependency tree `heads` (1-based, 0 the root) has as a
    constituent: the spans in which exactly one word, the head, has its head outside, and
    every word outside whose head is inside depends on that head (the other words' subtrees
    lie wholly inside; the head's dependents outside attach higher up)."""
    n, out = len(heads), {}
    for i in range(n):
        for j in range(i + 2, n + 1):
            outside = [k for k in range(i, j) if not i < heads[k] <= j]
            if len(outside) != 1:
                continue
            h = outside[0]
            if all(heads[k] == h + 1 for k in [*range(i), *range(j, n)] if i < heads[k] <= j):
                out[i, j] = h
    return out


def potentials(sentences: list[dict[tuple[int, int], int]], n: int, fix_heads: bool
               ) -> torch.Tensor:
    """(B, N+1, N+1, N) head potentials [b, start, width, head - start]: 0 where allowed,
    -inf elsewhere; with `fix_heads` only the gold head of each allowed span."""
    pot = torch.full((len(sentences), n + 1, n + 1, n), -math.inf)
    for b, spans in enumerate(sentences):
        for (i, j), h in spans.items():
            if fix_heads:
                pot[b, i, j - i, h - i] = 0.0
            else:
                pot[b, i, j - i, :j - i] = 0.0
    return pot


def train(condition: str, ids: list[list[int]], spans: list[dict], vocab: Vocabulary,
          args) -> tuple[LexicalizedParams, list[float]]:
    gen = torch.Generator().manual_seed(args.seed)
    model = LexicalizedParams(args.nonterminals, args.preterminals, len(vocab), args.classes,
                              args.dim, 1, gen, torch.float32)
    optimizer = torch.optim.Adam(model.parameters(), lr=args.lr)
    batches = length_batches([len(s) for s in ids], max_sentences=args.batch_size)
    steps, step, curve = args.epochs * len(batches), 0, []
    started = time.monotonic()
    for epoch in range(args.epochs):
        random.Random(f"{args.seed} {epoch}").shuffle(batches)   # the same order in both
        total, words = 0.0, 0
        for batch in batches:
            tokens, lengths = pad_ids([ids[k] for k in batch])
            pot = potentials([spans[k] for k in batch], tokens.shape[1], condition == "gold")
            beta = annealing_exponent(step, len(batches), args)
            logz = lexicalized_log_partition(model.factors(tokens, lengths).tempered(beta),
                                             lengths, head_pot=pot) / beta
            for group in optimizer.param_groups:
                group["lr"] = learning_rate(step, steps, args.lr, 20, "cosine")
            optimizer.zero_grad()
            (-logz.sum() / lengths.sum()).backward()
            optimizer.step()
            step += 1
            total += float(logz.detach().sum())
            words += int(lengths.sum())
        curve.append(total / words)
        print(f"{condition}: epoch {epoch + 1}/{args.epochs}, training log-likelihood per word "
              f"{total / words:.4f} ({time.monotonic() - started:.0f} s)", file=sys.stderr,
              flush=True)
    return model, curve


def annealing_exponent(step: int, steps_per_epoch: int, args) -> float:
    """beta of deterministic annealing at this update: from --anneal-from up to 1, linearly
    over the first --anneal-epochs epochs (1 throughout without annealing)."""
    if args.anneal_epochs <= 0:
        return 1.0
    done = min(1.0, step / (args.anneal_epochs * steps_per_epoch))
    return args.anneal_from + (1.0 - args.anneal_from) * done


@torch.no_grad()
def score(model: LexicalizedParams, ids: list[list[int]], gold: list[Dependencies],
          spans: list[dict], batch_size: int) -> dict:
    """Held-out log-likelihood per word with nothing fixed and with the gold heads fixed, and
    the attachment of the best derivation's heads."""
    free, fixed, words = 0.0, 0.0, 0
    predicted: list[list[int]] = [[] for _ in ids]
    for batch in length_batches([len(s) for s in ids], max_sentences=batch_size):
        tokens, lengths = pad_ids([ids[k] for k in batch])
        factors = model.factors(tokens, lengths)
        free += float(lexicalized_log_partition(factors, lengths).sum())
        pot = potentials([spans[k] for k in batch], tokens.shape[1], True)
        fixed += float(lexicalized_log_partition(factors, lengths, head_pot=pot).sum())
        words += int(lengths.sum())
        for k, parse in zip(batch, model.parse(tokens, lengths)):
            predicted[k] = parse.heads
    attachment = evaluate_attachment(predicted, gold)
    systems = attachment.to_dict()["systems"]
    return {"log_likelihood_per_word": free / words,
            "gold_heads_log_likelihood_per_word": fixed / words,
            "attachment": {name: {"directed": s["directed"], "undirected": s["undirected"],
                                  "ned": s["ned"]}
                           for name, s in systems.items()},
            "words_scored": attachment.counts["words_scored"]}


def main(argv: list[str] | None = None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("train", type=Path, help="CoNLL-U with heads: the training sentences")
    p.add_argument("test", type=Path, help="CoNLL-U with heads: the scored sentences")
    p.add_argument("--classes", type=int, default=16, help="latent head classes R (16)")
    p.add_argument("--nonterminals", type=int, default=20)
    p.add_argument("--preterminals", type=int, default=30)
    p.add_argument("--dim", type=int, default=64, help="embedding size (64)")
    p.add_argument("--epochs", type=int, default=10)
    p.add_argument("--lr", type=float, default=0.002)
    p.add_argument("--batch-size", type=int, default=16)
    p.add_argument("--max-length", type=int, default=40,
                   help="training sentences longer than this are left out (and counted)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--tags", action="store_true", help="the model reads the UPOS column")
    p.add_argument("--anneal-from", type=float, default=1.0,
                   help="deterministic annealing (Smith & Eisner 2004): train on the posterior "
                        "proportional to p(d)^beta, beta rising linearly from this value to 1")
    p.add_argument("--anneal-epochs", type=int, default=0,
                   help="... over this many epochs (0: no annealing)")
    p.add_argument("--condition", choices=("both",) + CONDITIONS, default="both",
                   help="train only this one (two processes can run the two side by side)")
    p.add_argument("--out", type=Path, help="also write the figures here as JSON")
    args = p.parse_args(argv)
    torch.set_num_threads(1)
    train_gold, train_lifted = read_heads(args.train, args.tags)
    test_gold, test_lifted = read_heads(args.test, args.tags)
    kept = [d for d in train_gold if len(d.words) <= args.max_length]
    vocab = Vocabulary.from_counts(Counter(w for d in kept for w in d.words), min_count=2)
    train_ids = [vocab.encode(d.words) for d in kept]
    test_ids = [vocab.encode(d.words) for d in test_gold]
    train_spans = [allowed_heads(d.heads) for d in kept]
    test_spans = [allowed_heads(d.heads) for d in test_gold]
    result = {"train": str(args.train), "test": str(args.test),
              "counts": {"train_sentences": len(kept),
                         "train_left_out_longer": len(train_gold) - len(kept),
                         "train_lifted": train_lifted, "test_sentences": len(test_gold),
                         "test_lifted": test_lifted, "vocabulary": len(vocab)},
              "options": {k: v for k, v in vars(args).items()
                          if k not in ("train", "test", "out", "condition")},
              "torch": torch.__version__, "conditions": {}}
    for condition in CONDITIONS if args.condition == "both" else (args.condition,):
        model, curve = train(condition, train_ids, train_spans, vocab, args)
        result["conditions"][condition] = {
            "training_curve": curve,
            "test": score(model, test_ids, test_gold, test_spans, args.batch_size)}
    print(json.dumps(result, indent=1))
    if args.out is not None:
        args.out.write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")
    return result


if __name__ == "__main__":
    main()
