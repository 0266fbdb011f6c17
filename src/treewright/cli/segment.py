"""treewright segment: word segmentation of unsegmented text, or morph segmentation of words,
with an adaptor grammar, as a config says, into one run folder."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright segment configs/segment_words.yaml
  treewright segment configs/segment_words.yaml sampler.sweeps=500 output.run_dir=runs/seg500
  treewright segment --resume runs/seg500
  treewright segment configs/segment_morphs.yaml

With grammar.unit morphs each line is one word, cut into prefixes, a stem and suffixes
(grammar.prefixes=false: a stem and suffixes only); with
data.format conllu the words are the distinct written words of a CoNLL-U file, and the tokens
each is written as are its gold morphs.

Each line of data.text is one utterance; the sampler sees its characters with the white space
taken out, and with data.gold the spaces are the gold words that token and boundary F1 are
scored against. Overrides are dotted key=value pairs read as YAML scalars; they win over the
file ('treewright validate --options --kind segment' lists every option).

The run folder (output.run_dir, default runs/<config name>) receives config.yaml (resolved),
segment.log, metrics.jsonl (log joint probability per sweep, F1 with gold), chains.json (the
checkpoint, every sampler.checkpoint_every sweeps) and at the end segmentation.txt (one
utterance per line, words separated by spaces) and lexicon.tsv (the cached words with their
customers and tables). --resume RUN continues an interrupted run from its last checkpoint with
the config saved there, and ends exactly as the uninterrupted run.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", nargs="?", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")
    p.add_argument("--resume", metavar="RUN",
                   help="continue the interrupted segmentation run in folder RUN")


def run(args) -> int:
    import sys

    from treewright.adaptor.config import load_segment_config
    from treewright.adaptor.run import segment_resume, segment_words
    from treewright.cli.common import config_and_folder
    from treewright.runfolder import RunFolder

    cfg, run_dir = config_and_folder(args, load_segment_config)
    try:
        if cfg is None:
            result = segment_resume(run_dir, stream=sys.stdout)
        else:
            result = segment_words(cfg, run_dir, stream=sys.stdout, config_source=args.config)
    except KeyboardInterrupt:
        print(f"treewright segment: interrupted; {RunFolder(run_dir, 'segment').checkpoint} "
              f"holds the last checkpoint. Continue with: treewright segment --resume "
              f"{run_dir}", file=sys.stderr)
        return 130
    print(result.segmentation)
    return 0
