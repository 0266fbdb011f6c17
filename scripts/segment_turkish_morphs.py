"""Morph segmentation of the Turkish web treebank's written words with an adaptor grammar
(issue 23), scored against the treebank's own token joins, beside the two baselines.

Data: the `web` section of the Turkish Web Treebank (PyPI turkish-treebanks, Apache-2.0, a
test dependency of treewright). Its orthographic words, punctuation taken out and lowercased,
come from `treewright.adaptor.morphs.read_written_words`; the syntactic tokens a written word
is split into (SpaceAfter=No between them) are its gold morphs.

The run: the stem-and-suffixes grammar of `treewright.adaptor.grammars.morph_grammar` (Stem and
Suffix adapted, Pitman-Yor discount 0.5 and concentration 10, even odds of another suffix and
another character: the defaults of the word grammar, chosen before any run and not tuned),
with its SubMorph level (a stem or suffix built of cached pieces, even odds; `--plain` leaves
it out, as `grammar.submorphs: false` does; no prefixes, as the config, unless `--prefixes`),
sampled over every distinct written word (all types, split or not, once each), `--chains`
chains (4, as configs/segment_morphs.yaml). The segmentation cuts the positions that more than
half of every chain's analyses after the last `--samples` sweeps `--sample-every` apart cut
(`treewright.adaptor.posterior`); the row below it is the chain with the highest log joint
probability alone. Each occurrence of a word takes its type's segmentation. Boundary
precision, recall and F1 are printed on the split words (the occurrences written as two or
more tokens: the goal) and on all words, beside the no-split and split-every-character
baselines.

    OMP_NUM_THREADS=1 PYTHONPATH=src .venv/bin/python scripts/segment_turkish_morphs.py
"""

from __future__ import annotations

import argparse
import sysconfig
import time
from pathlib import Path

from treewright.adaptor import AdaptorSampler, characters
from treewright.adaptor.grammars import morph_grammar
from treewright.adaptor.morphs import (baseline_scores, by_type, morph_segmentations,
                                       morph_units, read_written_words)
from treewright.adaptor.posterior import BoundaryTally, recorded_sweeps
from treewright.adaptor.run import best_chain
from treewright.evaluation import evaluate_segmentation
from treewright.tracking import Progress

TREEBANK = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"


def _row(name: str, words: list[list[str]], gold: list[list[str]]) -> str:
    b = evaluate_segmentation(words, gold).boundaries
    return f"{name:<22} {b.precision:9.3f} {b.recall:6.3f} {b.f1:6.3f}"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sweeps", type=int, default=60)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--chains", type=int, default=4)
    parser.add_argument("--samples", type=int, default=10)
    parser.add_argument("--sample-every", type=int, default=2)
    parser.add_argument("--conllu", type=Path, default=TREEBANK)
    parser.add_argument("--plain", action="store_true",
                        help="the grammar without its SubMorph level (grammar.submorphs=false)")
    parser.add_argument("--prefixes", action="store_true",
                        help="prefixes before the stem too (grammar.prefixes=true)")
    parser.add_argument("--also", type=Path, action="append", default=[],
                        help="another CoNLL-U file whose written words the sampler reads too "
                             "(raw words only); its split words are scored on their own")
    parser.add_argument("--case-rules", choices=("default", "turkic"), default="default",
                        help="how words and gold morphs are lowercased (corpus.lowercase)")
    args = parser.parse_args(argv)

    sections = {path: read_written_words(path, args.case_rules)
                for path in [args.conllu, *args.also]}
    for path, written in sections.items():
        print(f"{len(written.morphs)} written words ({len(written.split)} split, "
              f"{sum(len(m) - 1 for m in written.split)} gold boundaries), "
              f"{len(written.types())} types, from {written.sentences} sentences of {path.name}")
    types = list(dict.fromkeys(t for w in sections.values() for t in w.types()))
    print(f"{len(types)} distinct written words in all")
    start = time.perf_counter()
    chars = [characters(t) for t in types]      # a letter and its combining marks: one
    grammar = morph_grammar([c for t in chars for c in t], submorphs=not args.plain,
                            prefixes=args.prefixes)
    sampler = AdaptorSampler(grammar, chars,
                             chains=args.chains, seed=args.seed, source=str(args.conllu))
    tally = BoundaryTally.of(sampler)
    recorded = set(recorded_sweeps(args.sweeps, args.samples, args.sample_every))
    with Progress(args.sweeps * args.chains, "sweeps", unit="sweeps") as progress:
        for done in range(1, args.sweeps + 1):
            sampler.run(1, progress=lambda done, total: progress.update(1))
            if done in recorded:
                tally.record(sampler, morph_units(sampler.rules.names))
    seconds = time.perf_counter() - start
    best, joints = best_chain(sampler)
    rows = [(f"chain {best} alone", dict(zip(types, morph_segmentations(sampler, best))))]
    if tally.samples:
        least = tally.threshold("expected-f1")
        print(f"expected-f1 cuts at {least} of {tally.samples} analyses "
              f"(expected boundary F1 {tally.expected_f1(least):.3f}; majority: "
              f"{tally.threshold()}, {tally.expected_f1(tally.threshold()):.3f})")
        rows[:0] = [(f"pooled, {rule}", dict(zip(types, tally.segmentations(sampler.words,
                                                                            rule))))
                    for rule in ("majority", "expected-f1")]
    print(f"{args.sweeps} sweeps of {args.chains} chain(s) over {len(types)} types in "
          f"{seconds:.0f} s; log joint {', '.join(f'{j:.1f}' for j in joints)}")
    scored = [(f"{name} of {path.name}", gold) for path, written in sections.items()
              for name, gold in (("split words", written.split), ("all words", written.morphs))]
    for name, gold in scored:
        base = baseline_scores(gold)
        print(f"\nboundaries on {name} ({len(gold)})\n{'':<22} precision recall     F1")
        for label, segmented in rows:
            print(_row(label, by_type(segmented, gold), gold))
        for label, scores in base.items():
            b = scores.boundaries
            print(f"{label:<22} {b.precision:9.3f} {b.recall:6.3f} {b.f1:6.3f}")


if __name__ == "__main__":
    main()
