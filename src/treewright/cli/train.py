"""treewright train: induce a grammar as a config says, into one run folder."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  treewright train configs/em_demo.yaml
  treewright train configs/vb_demo.yaml prior.concentration=0.1 output.run_dir=runs/vb-sparse
  treewright train --resume runs/em_demo
  treewright train configs/em_demo.yaml --workers 2
  torchrun --nnodes 2 --node-rank R --nproc-per-node 2 --master-addr HOST0 \\
      --master-port 29500 -m treewright train configs/em_demo.yaml   # R = 0, 1 per machine

Overrides are dotted key=value pairs read as YAML scalars; they win over the file. Every option
is checked before training starts ('treewright validate CONFIG' does only that, and
'treewright validate --options' lists every option with its default).

The run folder (output.run_dir, default runs/<config name>) receives config.yaml (the resolved
config), train.log, data_summary.json, metrics.jsonl, tensorboard/, checkpoint.ckpt,
restart-<r>.pcfg and the result, grammar.pcfg. --resume continues from checkpoint.ckpt with
the saved config; in float64 it ends with exactly the grammar an uninterrupted run gives.
Ctrl-C stops at the next step with a checkpoint and prints the --resume command (a second
Ctrl-C stops at once).

--workers N starts N worker processes on this machine (torchrun's launcher, gloo on loopback);
each runs the E-step or gradient of its share of every update, and the grammar after each update
is the one a single process computes (up to summation order). Under torchrun (any number of
machines) the same command runs as one worker of the job. Only rank 0 writes the run folder; a
run may be resumed with any number of workers. A worker that dies ends the job with its rank
named (distributed.timeout_seconds). Ctrl-C stops all the workers after the same step.
"""


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", nargs="?", help="YAML config file")
    p.add_argument("overrides", nargs="*", metavar="key=value", help="dotted config overrides")
    p.add_argument("--resume", metavar="RUN", help="continue the run in this folder")
    p.add_argument("--workers", type=int, metavar="N",
                   help="train with N local worker processes (torchrun on 127.0.0.1)")


def run(args) -> int:
    import os
    import sys

    from treewright.cli.common import config_and_folder
    from treewright.errors import InputError
    from treewright import induce
    from treewright.runfolder import RunFolder
    from treewright.train import TrainingDiverged, load_train_config
    from treewright.train.distributed import WorkerLost, launch_local, world_from_env
    from treewright.train.loop import saved_config

    cfg, run_dir = config_and_folder(args, load_train_config)
    folder = RunFolder(run_dir, "train")
    if cfg is None:
        cfg = saved_config(run_dir)
    if args.workers is not None and "RANK" not in os.environ:
        if args.workers < 1:
            raise InputError(f"--workers must be at least 1, got {args.workers}")
        # The config was checked above, once; each worker re-reads it the same way.
        own = ["--resume", args.resume] if args.resume is not None else \
            [args.config, *args.overrides]
        launched = launch_local(args.workers, ["train", *own])
        again = f"treewright train --resume {run_dir} --workers {args.workers}"
        if launched.returncode != 0:
            print(f"treewright train: {launched.message}. Continue from the last checkpoint "
                  f"with: {again}", file=sys.stderr)
            return launched.returncode
        if launched.interrupted and not folder.grammar.exists():
            print(f"treewright train: interrupted; the checkpoint {folder.checkpoint} holds "
                  f"the run so far. Continue it with: {again}", file=sys.stderr)
            return 130
        return 0  # rank 0 printed the grammar's path
    world = world_from_env(cfg.distributed.timeout_seconds,
                           cfg.distributed.collective_timeout_seconds)
    try:
        result = induce.run(cfg, run_dir, resume=args.resume is not None,
                            config_source=args.config, world=world)
    except (TrainingDiverged, WorkerLost) as err:
        world.close(failure=str(err))
        print(f"treewright train: {err}", file=sys.stderr)
        return 1
    except OSError as err:
        # A full disk or a folder that stopped being writable mid-run: checkpoints are written
        # atomically, so the last good one is still whole.
        world.close(failure=f"{type(err).__name__}: {err}")
        print(f"treewright train: cannot write {err.filename or 'a file'}: {err.strerror}; the "
              f"last checkpoint written is left as it was. Make room, then continue with: "
              f"treewright train --resume {run_dir}", file=sys.stderr)
        return 1
    except BaseException as err:
        world.close(failure=f"{type(err).__name__}: {err}")
        raise
    world.close()
    if not world.is_main or "RANK" in os.environ and result is None:
        return 0  # a launcher started this worker: it reports the run's end
    if result is None:  # Ctrl-C: stopped after a checkpoint
        print(f"treewright train: interrupted; the checkpoint {folder.checkpoint} holds the run "
              f"so far. Continue it with: treewright train --resume {run_dir}", file=sys.stderr)
        return 130
    print(result.grammar_path)
    return 0
