"""Word lists of invented affixing languages, with their morphs as the gold, for the morph
segmentation job (issue 23): `treewright segment` with `grammar.unit: morphs` reads one word
per line and takes its spaces as the gold morph boundaries.

Scenario. The salt traders of the invented inland sea of Vessen speak three invented
varieties: one that affixes only at the front of the word (prefixes), one only at the back
(suffixes), and one at both. Each variety has 400 stems of one to three syllables (a consonant
and a vowel, sometimes a final n, l or r) drawn from a seeded inventory, and 8 prefixes and 8
suffixes of one syllable each from the same inventory, so that an affix may also begin or end
a stem, as in real languages. A word is a stem drawn with Zipf-like weights (stem k with
weight 1 / (k + 1)) and, at each affixing end, 0, 1 or 2 affixes (probabilities 0.3, 0.45 and
0.25), each drawn uniformly. Words are drawn until `--words` distinct ones are found; they
are written in the order found, morphs separated by spaces. No real language's data is used.

    .venv/bin/python scripts/make_affix_language.py --affixes prefixes --words 2000 > front.txt
    treewright segment configs/segment_morphs.yaml data.text=front.txt data.format=lines \\
        grammar.prefixes=true sampler.cut_rule=majority output.run_dir=runs/front

The figures in docs/adaptor_notes.md ("Prefixes") come from this script with seed 0.
"""

from __future__ import annotations

import argparse
import random

KINDS = ("prefixes", "suffixes", "both")
CONSONANTS = "ptkmnslrvdgb"
VOWELS = "aeiou"


def affix_language(affixes: str, words: int, seed: int = 0) -> list[str]:
    """`words` distinct words of the variety `affixes` (one of KINDS), morphs separated by
    single spaces."""
    if affixes not in KINDS:
        raise ValueError(f"affixes must be one of {KINDS}, not {affixes!r}")
    rng = random.Random(seed)

    def syllable() -> str:
        onset, vowel = rng.choice(CONSONANTS), rng.choice(VOWELS)
        return onset + vowel + (rng.choice("nlr") if rng.random() < 0.3 else "")

    def morph(syllables: int) -> str:
        return "".join(syllable() for _ in range(syllables))

    stems = list(dict.fromkeys(morph(rng.choice((1, 2, 2, 3))) for _ in range(600)))[:400]
    pieces = list(dict.fromkeys(morph(1) for _ in range(40)))
    prefixes, suffixes = pieces[:8], pieces[8:16]
    weights = [1.0 / (k + 1) for k in range(len(stems))]

    def some(choices: list[str]) -> list[str]:
        count = rng.choices((0, 1, 2), weights=(0.3, 0.45, 0.25))[0]
        return [rng.choice(choices) for _ in range(count)]

    found: dict[str, str] = {}
    while len(found) < words:
        stem = rng.choices(stems, weights=weights)[0]
        front = some(prefixes) if affixes in ("prefixes", "both") else []
        back = some(suffixes) if affixes in ("suffixes", "both") else []
        morphs = [*front, stem, *back]
        found.setdefault("".join(morphs), " ".join(morphs))
    return list(found.values())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--affixes", choices=KINDS, default="both")
    parser.add_argument("--words", type=int, default=2000)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    print("\n".join(affix_language(args.affixes, args.words, args.seed)))


if __name__ == "__main__":
    main()
