"""A small refinement run from hand-written trees, for tests of what it writes."""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

from treewright.refine import load_refine_config, refine


def refine_on_trees(folder: Path, train: Sequence[str], held_out: Sequence[str],
                    em_iterations: int = 2) -> tuple[Path, Path, Path]:
    """One split-merge cycle (no smoothing to speak of) from the bracketed `train` trees with
    `held_out` as its held-out set, written in `folder`: (run folder, train file, held-out
    file)."""
    train_path, dev_path = folder / "train.trees", folder / "dev.trees"
    train_path.write_text("".join(t + "\n" for t in train), encoding="utf-8")
    dev_path.write_text("".join(t + "\n" for t in held_out), encoding="utf-8")
    run = folder / "run"
    cfg = load_refine_config(None, [
        "data.start=treebank", f"data.train={train_path}", f"data.dev={dev_path}",
        "data.rare_count=0", "refine.cycles=1", f"refine.em_iterations={em_iterations}",
        "refine.smoothed_iterations=1", "output.tensorboard=false",
        "output.stdout_metrics=false", f"output.run_dir={run}"])
    refine(cfg, run)
    return run, train_path, dev_path
