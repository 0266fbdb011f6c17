"""Training: the EM family (batch, stepwise, MAP, variational Bayes), gradient training,
supervised estimation from trees, and the run loop with its run folder.

Library entry points (the CLI is a thin layer over them):
- `load_train_config(path, overrides)` -> `TrainConfig` (checked as a whole);
- `train(cfg, run_dir)` -> fitted `Trainer` (`grammar_path_`, `results_`, `best_restart_`);
- `resume(run_dir)` continues an interrupted run;
- `supervised.estimate_from_trees(trees)` -> `Grammar` (relative frequencies).
"""

from treewright.train.config import TrainConfig, check_combinations, load_train_config
from treewright.train.loop import Trainer, TrainingDiverged, resume, train

__all__ = ["TrainConfig", "Trainer", "TrainingDiverged", "check_combinations",
           "load_train_config", "resume", "train"]
