"""Training: the EM family (batch, stepwise, MAP, variational Bayes), gradient training,
supervised estimation from trees, and the run loop with its run folder.

Library entry points (the CLI is a thin layer over them):
- `load_train_config(path, overrides)` -> `TrainConfig` (checked as a whole);
- `train(cfg, run_dir)` -> fitted `Trainer` (`grammar_path_`, `results_`, `best_restart_`);
- `resume(run_dir)` continues an interrupted run; `fit(sentences, cfg)` trains from token
  lists in memory;
- `supervised.estimate_from_trees(trees)` -> `Grammar` (relative frequencies).

`train`, `resume` and `fit` live in `treewright.induce`, the layer above decoding and
evaluation that builds the dev evaluator; they are named here, loaded on first use, because
this is where a user looks for them.
"""

from treewright.train.config import TrainConfig, check_combinations, load_train_config
from treewright.train.loop import RunResult, Trainer, TrainingDiverged

__all__ = ["RunResult", "TrainConfig", "Trainer", "TrainingDiverged", "check_combinations",
           "fit", "load_train_config", "resume", "train"]


def __getattr__(name: str):
    if name in ("train", "resume", "fit"):
        from treewright import induce
        return getattr(induce, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
