"""treewright score: per-sentence log-probability under a grammar, then a corpus summary."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright score src/treewright/data/examples/astronomers.pcfg sentences.txt
  echo "astronomers saw stars with ears" | treewright score src/treewright/data/examples/astronomers.pcfg -

Each sentence gives one JSON line: {"line", "tokens", "logprob", "unknown"}; logprob is the
natural log of the sum over all trees, null when the sentence has no parse. The last line is
the summary: total log-likelihood, per-word cross-entropy and perplexity over parsed sentences.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("grammar", help="grammar: a grammar text file, a JSON export or a run folder")
    p.add_argument("text", help="raw text, one sentence per line, whitespace tokens ('-': stdin)")
    p.add_argument("--batch-size", type=int, default=64)
    p.add_argument("--float64", action="store_true", help="compute in double precision")


def run(args) -> int:
    import torch

    from treewright.cli.common import as_trained, dumps, read_sentences
    from treewright.export import open_grammar  # text, JSON export or run folder
    from treewright.inference import corpus_summary, score

    source = open_grammar(args.grammar)
    grammar = source.grammar
    lines = read_sentences(args.text)
    dtype = torch.float64 if args.float64 else torch.float32
    scores = score(grammar, as_trained(source, lines), args.batch_size, dtype)
    for (line, _), s in zip(lines, scores):
        print(dumps({"line": line, "tokens": s.words, "logprob": s.logprob,
                     "parsed": s.parsed, "unknown": s.unknown}))
    print(dumps({"summary": corpus_summary(scores)}))
    return 0
