"""Speed of the adaptor-grammar sampler (issue 23): sweeps per second of one chain of the
unigram word grammar over 2,000 utterances of Ostreli (the invented language of
`segment_invented_language.py`) of up to 30 characters, at one thread.

The chain is initialized, `--warmup` sweeps are run untimed (the first sweeps, with a cache
still far from its settled size, are not typical), then `--sweeps` sweeps are timed. The time
for 1,000 sweeps is extrapolated from the measured rate, unless `--sweeps 1000` runs them
(with `--warmup 0`, the target's 1,000 sweeps from the start). The machine is shared, so a
figure is only comparable with one measured in the same period; `--repeat` runs the timing
several times and reports each. Each figure is given in wall time and in the process's CPU
time, which a loaded host inflates less.

    OMP_NUM_THREADS=1 PYTHONPATH=src .venv/bin/python scripts/bench_adaptor.py
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from segment_invented_language import ostreli  # noqa: E402

from treewright.adaptor import AdaptorSampler, parse_utterances  # noqa: E402
from treewright.adaptor.grammars import unigram_word_grammar  # noqa: E402
from treewright.adaptor.sampler import STARTS  # noqa: E402

UTTERANCES = 2000
LONGEST = 30


def corpus(utterances: int = UTTERANCES, longest: int = LONGEST) -> list[list[str]]:
    """The first `utterances` Ostreli lines of at most `longest` characters, unsegmented."""
    lines: list[str] = []
    drawn = 2 * utterances
    while len(lines) < utterances:
        lines = [line for line in ostreli(drawn) if len(line.replace(" ", "")) <= longest]
        drawn *= 2
    return parse_utterances(lines[:utterances]).characters


def main(argv: list[str] | None = None) -> list[float]:
    """Runs the benchmark; returns the measured sweeps per second of each repeat."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--utterances", type=int, default=UTTERANCES)
    parser.add_argument("--warmup", type=int, default=3)
    parser.add_argument("--sweeps", type=int, default=10)
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--start", choices=STARTS, default="batch",
                        help="the chain's first state (AdaptorSampler's start); the speed "
                             "of a sweep depends on the state it reaches")
    args = parser.parse_args(argv)
    if os.environ.get("OMP_NUM_THREADS") != "1":
        print("note: OMP_NUM_THREADS is not 1; the figure is meant for one thread")
    sentences = corpus(args.utterances)
    chars = [c for s in sentences for c in s]
    print(f"{len(sentences)} utterances, {len(chars)} characters, up to "
          f"{max(map(len, sentences))} per utterance")
    start = time.perf_counter()
    sampler = AdaptorSampler(unigram_word_grammar(chars), sentences, seed=args.seed,
                             start=args.start)
    print(f"initialized in {time.perf_counter() - start:.2f} s")
    sampler.run(args.warmup)
    rates = []
    for _ in range(args.repeat):
        start, cpu = time.perf_counter(), time.process_time()
        sampler.run(args.sweeps)
        rates.append(args.sweeps / (time.perf_counter() - start))
        # CPU time as well: on a loaded host the wall time also counts the waits for a core
        cpu_rate = args.sweeps / max(time.process_time() - cpu, 1e-9)
        how = "measured" if args.sweeps == 1000 else "extrapolated, not run"
        print(f"{rates[-1]:.2f} sweeps/s over {args.sweeps} sweeps ({cpu_rate:.2f} per CPU "
              f"second); 1,000 sweeps take {1000 / rates[-1] / 60:.1f} min "
              f"({1000 / cpu_rate / 60:.1f} CPU min) ({how})", flush=True)
    return rates


if __name__ == "__main__":
    main()
