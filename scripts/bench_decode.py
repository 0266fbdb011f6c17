"""Benchmark of the MBR and max-rule-product decoders: this tree against a baseline version of
`treewright/decode.py` taken from git, timed alternately in one process.

    .venv/bin/python scripts/bench_decode.py --threads 1                # baseline: main
    .venv/bin/python scripts/bench_decode.py --baseline HEAD~3 --sentences 20 --repeats 1

Grammars: the demo grammar (`src/treewright/data/demo/grammar.pcfg`) and a refined version of
it, every symbol split in two `--splits` times (`refine.split` with a 1% perturbation, seed 0),
symbols NAME·k, the kind of grammar max-rule-product is meant for (a baseline from before
NAME·k gets the same grammar named NAME@k, and its trees are compared in our names). Sentences: the first `--sentences` lines of
the demo dev set of at most `--max-length` words. For each grammar and decoder it prints the
best-of-repeats seconds of both versions, their ratio, and whether the decoded trees are equal.
The baseline module is compiled from `git show BASELINE:src/treewright/decode.py` and uses this
tree's engine and other modules. Not a timed test: numbers depend on the machine and its load.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
import types
from pathlib import Path

import torch

from treewright import decode as new_decode
from treewright import engine
from treewright.allocator import tune_allocator
from treewright.export.rename import rename_tree
from treewright.grammar import Grammar, fine_name, load_grammar, split_name
from treewright.refine import latent_from_grammar, split

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "src" / "treewright" / "data" / "demo"


def baseline_module(ref: str) -> types.ModuleType:
    source = subprocess.run(["git", "show", f"{ref}:src/treewright/decode.py"], cwd=ROOT,
                            check=True, capture_output=True, text=True).stdout
    module = types.ModuleType("baseline_decode")
    module.__file__ = f"{ref}:src/treewright/decode.py"
    sys.modules[module.__name__] = module  # dataclasses look their module up by name
    exec(compile(source, module.__file__, "exec"), module.__dict__)
    module.engine = _EngineOfLogTables()
    return module


class _EngineOfLogTables(types.SimpleNamespace):
    """This tree's engine for a `decode.py` from before `engine.SpanTables` kept its scores in
    the chart's scale: such a version builds span tables from log inside and outside tables
    (`SpanTables(logz=, inside=, outside=, marginals=)`), rescaled here per cell."""

    def __getattr__(self, name):
        return getattr(engine, name)

    @staticmethod
    def SpanTables(logz, inside=None, outside=None, marginals=None, **scaled):
        if inside is None:
            return engine.SpanTables(logz, marginals, **scaled)
        top = inside.amax(-1)
        scale = torch.where(torch.isfinite(top), top, torch.zeros_like(top))
        return engine.SpanTables(logz, marginals, (inside - scale[..., None]).exp(),
                                 (outside + scale[..., None]).exp(), scale)


def in_its_names(module, grammar: Grammar) -> tuple[Grammar, dict[str, str]]:
    """The grammar with its subcategory names in the form `module` reads (versions before
    NAME·k wrote NAME@k), and the map from that form's labels back to ours."""
    if module.coarse_name(fine_name("X", 1)) == "X":
        return grammar, {}
    def theirs(name: str) -> str:
        coarse, k = split_name(name)
        return name if k is None else f"{coarse}@{k}"
    names = {theirs(x): x for x in grammar.symbols}
    return Grammar([theirs(x) for x in grammar.nonterminals],
                   [theirs(x) for x in grammar.preterminals], grammar.vocab, grammar.root,
                   grammar.binary, grammar.lexical, grammar.start), names


def timed(module, grammar, sentences, decoder, repeats):
    grammar, back = in_its_names(module, grammar)
    best, trees = float("inf"), None
    for _ in range(repeats):
        began = time.perf_counter()
        result = module.decode(grammar, sentences, decoder)
        best = min(best, time.perf_counter() - began)
        trees = [None if d.tree is None else rename_tree(d.tree, back).to_string() for d in result]
    return best, trees


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--baseline", default="main", help="git revision of the old decode.py")
    parser.add_argument("--sentences", type=int, default=40)
    parser.add_argument("--max-length", type=int, default=18)
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--threads", type=int, default=None, help="torch threads")
    parser.add_argument("--splits", type=int, default=1,
                        help="how many times the refined grammar splits every symbol in two")
    args = parser.parse_args()
    tune_allocator()
    if args.threads:
        torch.set_num_threads(args.threads)
    old = baseline_module(args.baseline)
    lines = (DEMO / "dev.txt").read_text(encoding="utf-8").splitlines()
    sentences = [line.split() for line in lines if 0 < len(line.split()) <= args.max_length]
    sentences = sentences[:args.sentences]
    demo = load_grammar(DEMO / "grammar.pcfg")
    refined = latent_from_grammar(demo)
    for _ in range(args.splits):
        refined = split(refined, 0.01, torch.Generator().manual_seed(0))
    grammars = {"demo": demo, f"demo split x{2 ** args.splits}": refined.to_grammar()}
    print(f"{len(sentences)} sentences of at most {args.max_length} words; baseline "
          f"{args.baseline}; torch threads {torch.get_num_threads()}")
    for name, grammar in grammars.items():
        for decoder in ("mbr", "max-rule-product"):
            # Alternate the two versions so that the machine's drift hits both alike.
            t_new, trees_new = timed(new_decode, grammar, sentences, decoder, args.repeats)
            t_old, trees_old = timed(old, grammar, sentences, decoder, args.repeats)
            same = sum(a == b for a, b in zip(trees_new, trees_old))
            print(f"{name:18s} ({grammar.num_symbols:3d} symbols) {decoder:16s} "
                  f"old {t_old:7.2f} s  new {t_new:6.2f} s  old/new {t_old / t_new:6.1f}x  "
                  f"equal trees {same}/{len(sentences)}", flush=True)


if __name__ == "__main__":
    main()
