"""The `treewright` command line: one small module per command, each a thin layer over the
library (`add_arguments(parser)` and `run(args) -> int`)."""

from __future__ import annotations

import argparse
import importlib
import sys

from treewright.allocator import tune_allocator
from treewright.errors import InputError

# name -> (module, one-line summary). Modules are imported only when their command runs.
COMMANDS = {
    "demo": ("treewright.cli.demo", "the whole job on the embedded demo corpus"),
    "train": ("treewright.cli.train", "induce a grammar as a config says, into a run folder"),
    "validate": ("treewright.cli.validate", "check a training config and do nothing else"),
    "refine": ("treewright.cli.refine",
               "split-merge refinement of a grammar's symbols into subcategories"),
    "score": ("treewright.cli.score", "log-probability of each sentence under a grammar"),
    "parse": ("treewright.cli.parse", "the best tree of each sentence"),
    "sample": ("treewright.cli.sample", "draw sentences with their trees from a grammar"),
    "export": ("treewright.cli.export", "write a grammar or parsed text in another format"),
    "inspect": ("treewright.cli.inspect", "a grammar's symbols, rules and usage in the terminal"),
    "compare": ("treewright.cli.compare", "two grammars' likelihood, brackets and symbol matching"),
    "evaluate": ("treewright.cli.evaluate",
                 "bracket F1 of predicted trees against gold, beside the baselines"),
    "report": ("treewright.cli.report", "one self-contained HTML page about a training run"),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="treewright",
        description="Induce, refine, evaluate and export probabilistic context-free grammars.",
        epilog="Run 'treewright COMMAND --help' for a command's options and examples.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, summary) in COMMANDS.items():
        module = importlib.import_module(module_name)
        cmd = sub.add_parser(name, help=summary, description=summary,
                             epilog=getattr(module, "EXAMPLES", None),
                             formatter_class=argparse.RawDescriptionHelpFormatter)
        module.add_arguments(cmd)
        cmd.set_defaults(_handler=module.run)  # not "run": commands may take a RUN argument
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    tune_allocator()  # a one-off process: keep freed tensor memory mapped (engine/allocator.py)
    try:
        return int(args._handler(args) or 0)
    except InputError as err:
        print(f"treewright {args.command}: {err}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print(f"treewright {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
