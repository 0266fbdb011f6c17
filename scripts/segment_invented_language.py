"""Word segmentation of an invented language with the unigram adaptor grammar (issue 23).

Scenario. The ferry pilots of the invented harbour town of Ostrel call out in Ostreli, a
language made up here: its words are drawn from a seeded syllable inventory (consonant and
vowel, an optional final n), and its utterances are strings of 1 to 6 words drawn from a
Zipf-like unigram distribution (word k of the lexicon with weight 1 / (k + 2)). No real
language's data is used. The utterances are written without spaces; the spaces kept aside are
the gold segmentation.

The run: the unigram word grammar of `treewright.adaptor.grammars` over the utterances'
characters (Word adapted, Pitman-Yor discount 0.5 and concentration 10, chosen before any run
and not tuned), one chain of the sentence-blocked Metropolis-Hastings sampler from a batch
start (`--start incremental` for the other; docs/adaptor_notes.md), and after every
`--every` sweeps the token and boundary F1 of chain 0's segmentation against the gold one, the
log joint probability, and the sweeps per second so far.

    OMP_NUM_THREADS=1 PYTHONPATH=src .venv/bin/python scripts/segment_invented_language.py

`--write FILE` writes the `--utterances` lines with their spaces (the gold) to FILE and stops:
`src/treewright/data/examples/ostreli.txt`, which configs/segment_words.yaml reads, is
`--write` with `--utterances 400`.
"""

from __future__ import annotations

import argparse
import random
import time

from treewright.adaptor import AdaptorSampler, parse_utterances
from treewright.adaptor.grammars import unigram_word_grammar
from treewright.adaptor.sampler import STARTS
from treewright.evaluation import evaluate_segmentation

SEED = 2026
ONSETS = "ptkmnslrvh"
VOWELS = "aeiou"


def ostreli(utterances: int, lexicon_size: int = 60, seed: int = SEED) -> list[str]:
    """`utterances` lines of Ostreli, words separated by single spaces (the gold)."""
    rng = random.Random(seed)
    words: list[str] = []
    while len(words) < lexicon_size:
        syllables = rng.choice((1, 2, 2, 3))
        word = "".join(rng.choice(ONSETS) + rng.choice(VOWELS) + ("n" if rng.random() < 0.2
                                                                 else "")
                       for _ in range(syllables))
        if word not in words:
            words.append(word)
    weights = [1.0 / (k + 2) for k in range(lexicon_size)]
    return [" ".join(rng.choices(words, weights=weights, k=rng.randint(1, 6)))
            for _ in range(utterances)]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--utterances", type=int, default=1000)
    parser.add_argument("--sweeps", type=int, default=150)
    parser.add_argument("--every", type=int, default=10)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--start", choices=STARTS, default="batch",
                        help="the chain's first state (AdaptorSampler's start)")
    parser.add_argument("--write", metavar="FILE", help="write the utterances, spaced, and stop")
    args = parser.parse_args()
    if args.write:
        with open(args.write, "w", encoding="utf-8", newline="\n") as f:
            f.writelines(line + "\n" for line in ostreli(args.utterances))
        return
    corpus = parse_utterances(ostreli(args.utterances))
    chars = [c for u in corpus.characters for c in u]
    print(f"{len(corpus.characters)} utterances, {len(chars)} characters, "
          f"{sum(map(len, corpus.gold))} gold words, "
          f"{len({w for u in corpus.gold for w in u})} word types")
    grammar = unigram_word_grammar(chars)
    start = time.perf_counter()
    sampler = AdaptorSampler(grammar, corpus.characters, seed=args.seed, start=args.start)
    print(f"initialized in {time.perf_counter() - start:.1f} s")
    start = time.perf_counter()
    print("sweep  token-F1  boundary-F1  log-joint  words-cached  sweeps/s")
    for done in range(args.every, args.sweeps + 1, args.every):
        sampler.run(args.every)
        scores = evaluate_segmentation(sampler.segmentations("Word"), corpus.gold)
        chain = sampler.chains[0]
        rate = done / (time.perf_counter() - start)
        print(f"{done:5d}  {scores.tokens.f1:8.3f}  {scores.boundaries.f1:11.3f}  "
              f"{chain.log_joint():9.1f}  {len(sampler.lexicon('Word')):12d}  {rate:8.2f}",
              flush=True)
    print("most used cached words:", sampler.lexicon("Word")[:10])


if __name__ == "__main__":
    main()
