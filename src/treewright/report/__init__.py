"""Reports on a grammar and its training run: evaluation from files, and one HTML page per run.

- `scoring`: `evaluate_files`, predicted trees against gold (bracketed trees or CoNLL-U), tags and
  held-out likelihood, as JSON and as a table (the `treewright evaluate` command).
- `html`: `build_report(run_dir, ...)`, one self-contained HTML page with every figure drawn as
  inline SVG (the `treewright report` command).
"""

from treewright.report.html import build_report, write_report
from treewright.report.scoring import EvaluationReport, evaluate_files

__all__ = ["EvaluationReport", "build_report", "evaluate_files", "write_report"]
