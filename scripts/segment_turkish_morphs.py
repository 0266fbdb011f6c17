"""Morph segmentation of the Turkish web treebank's written words with an adaptor grammar
(issue 23), scored against the treebank's own token joins, beside the two baselines.

Data: the `web` section of the Turkish Web Treebank (PyPI turkish-treebanks, Apache-2.0, a
test dependency of treewright). Its orthographic words, punctuation taken out and lowercased,
come from `treewright.adaptor.morphs.read_written_words`; the syntactic tokens a written word
is split into (SpaceAfter=No between them) are its gold morphs.

The run: the stem-and-suffixes grammar of `treewright.adaptor.grammars.morph_grammar` (Stem and
Suffix adapted, Pitman-Yor discount 0.5 and concentration 10, even odds of another suffix and
another character: the defaults of the word grammar, chosen before any run and not tuned),
sampled over every distinct written word (all types, split or not, once each), one chain.
Each occurrence of a word takes its type's segmentation. Boundary precision, recall and F1 are
printed on the split words (the occurrences written as two or more tokens: the goal) and on
all words, for the sampler and for the no-split and split-every-character baselines.

    OMP_NUM_THREADS=1 PYTHONPATH=src .venv/bin/python scripts/segment_turkish_morphs.py
"""

from __future__ import annotations

import argparse
import sysconfig
import time
from pathlib import Path

from treewright.adaptor import AdaptorSampler
from treewright.adaptor.grammars import morph_grammar
from treewright.adaptor.morphs import (baseline_scores, by_type, morph_segmentations,
                                       read_written_words)
from treewright.evaluation import evaluate_segmentation
from treewright.tracking import Progress

TREEBANK = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"


def _row(name: str, words: list[list[str]], gold: list[list[str]]) -> str:
    b = evaluate_segmentation(words, gold).boundaries
    return f"{name:<18} {b.precision:9.3f} {b.recall:6.3f} {b.f1:6.3f}"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sweeps", type=int, default=60)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--conllu", type=Path, default=TREEBANK)
    args = parser.parse_args(argv)

    written = read_written_words(args.conllu)
    types = written.types()
    print(f"{len(written.morphs)} written words ({len(written.split)} split, "
          f"{sum(len(m) - 1 for m in written.split)} gold boundaries), {len(types)} types, "
          f"from {written.sentences} sentences of {args.conllu.name}")
    start = time.perf_counter()
    sampler = AdaptorSampler(morph_grammar("".join(types)), [list(t) for t in types],
                             seed=args.seed, source=str(args.conllu))
    with Progress(args.sweeps, "sweeps", unit="sweeps") as progress:
        sampler.run(args.sweeps, progress=lambda done, total: progress.update(1))
    seconds = time.perf_counter() - start
    segmented = dict(zip(types, morph_segmentations(sampler)))
    print(f"{args.sweeps} sweeps over {len(types)} types in {seconds:.0f} s")
    for name, gold in (("split words", written.split), ("all words", written.morphs)):
        base = baseline_scores(gold)
        print(f"\nboundaries on {name} ({len(gold)})\n{'':<18} precision recall     F1")
        print(_row("adaptor grammar", by_type(segmented, gold), gold))
        for label, scores in base.items():
            b = scores.boundaries
            print(f"{label:<18} {b.precision:9.3f} {b.recall:6.3f} {b.f1:6.3f}")


if __name__ == "__main__":
    main()
