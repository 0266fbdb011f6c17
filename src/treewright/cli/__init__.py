"""The `treewright` command line: one small module per command, each a thin layer over the
library (`add_arguments(parser)` and `run(args) -> int`)."""

from __future__ import annotations

import argparse
import importlib
import sys

from treewright.allocator import tune_allocator
from treewright.errors import InputError
from treewright.threads import threads_wanted, use_threads

# name -> (module, one-line summary). Modules are imported only when their command runs.
COMMANDS = {
    "demo": ("treewright.cli.demo", "the whole job on the embedded demo corpus"),
    "train": ("treewright.cli.train", "induce a grammar as a config says, into a run folder"),
    "validate": ("treewright.cli.validate",
                 "check a training, refine or segment config and do nothing else"),
    "refine": ("treewright.cli.refine",
               "split-merge refinement of a grammar's symbols into subcategories"),
    "segment": ("treewright.cli.segment",
                "split unsegmented text into words, or words into morphs, with an adaptor "
                "grammar, into a run folder"),
    "score": ("treewright.cli.score", "log-probability of each sentence under a grammar"),
    "parse": ("treewright.cli.parse", "the best tree of each sentence"),
    "sample": ("treewright.cli.sample", "draw sentences with their trees from a grammar"),
    "export": ("treewright.cli.export", "write a grammar or parsed text in another format"),
    "inspect": ("treewright.cli.inspect", "a grammar's symbols, rules and usage in the terminal"),
    "compare": ("treewright.cli.compare", "two grammars' likelihood, brackets and symbol matching"),
    "evaluate": ("treewright.cli.evaluate",
                 "bracket F1 of predicted trees against gold, beside the baselines"),
    "report": ("treewright.cli.report",
               "one self-contained HTML page about a train, refine or segment run"),
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
        cmd.add_argument("--threads", type=int, metavar="N",
                         help="torch threads in this process (default: $OMP_NUM_THREADS, else 1; "
                              "parallelize with processes instead, as train --workers does)")
        cmd.set_defaults(_handler=module.run)  # not "run": commands may take a RUN argument
    return parser


def parse_arguments(parser: argparse.ArgumentParser, argv: list[str] | None):
    """The parsed arguments, with `key=value` overrides accepted anywhere among the options.

    argparse fills a command's positional arguments from the first run of them only, so in
    `train CONFIG a=1 --workers 2 b=2` the `b=2` would be unrecognized. Leftover words that look
    like overrides join the command's `overrides` list, in their order; anything else is the
    usual "unrecognized arguments" error."""
    args, extra = parser.parse_known_args(argv)
    if extra:
        takes_overrides = isinstance(getattr(args, "overrides", None), list)
        if not takes_overrides or not all(looks_like_override(word) for word in extra):
            parser.error("unrecognized arguments: " + " ".join(extra))
        args.overrides.extend(extra)
    return args


def looks_like_override(word: str) -> bool:
    """A `dotted.key=value` word (not an option such as --x=1)."""
    return not word.startswith("-") and "=" in word.split(" ", 1)[0]


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parse_arguments(parser, argv)
    if args.command is None:
        parser.print_help()
        return 2
    tune_allocator()  # a one-off process: keep freed tensor memory mapped (engine/allocator.py)
    try:
        use_threads(threads_wanted(args.threads))  # one by default: see treewright/threads.py
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
