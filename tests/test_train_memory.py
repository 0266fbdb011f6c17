"""The memory budget: batches are cut to fit, over-long sentences are set aside and reported,
and a corpus with a few 200-word sentences trains under the budget."""

from __future__ import annotations

import subprocess
import sys

import pytest

from treewright.engine.memory import inside_outside_bytes

# The peak resident size grown by one call, in KiB. Linux's /proc/self/clear_refs with "5"
# resets the peak (VmHWM) to the current size, so a transient peak before the call (a first
# import compiling sources, say) is not mistaken for, or does not hide, the call's own.
PEAK_PROBE = (
    "def _status(key):\n"
    "    with open('/proc/self/status') as f:\n"
    "        return next(int(x.split()[1]) for x in f if x.startswith(key))\n"
    "def reset_peak():\n"
    "    with open('/proc/self/clear_refs', 'w') as f:\n"
    "        f.write('5')\n"
    "    return _status('VmRSS:')\n"
    "def peak():\n"
    "    return _status('VmHWM:')\n")


def _peak_mib(code: str) -> float:
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env={"OMP_NUM_THREADS": "1", "PATH": ""}, check=True)
    return float(out.stdout.split()[-1])


@pytest.mark.parametrize("batch,length,nt,t,per_sentence", [
    (1, 120, 10, 20, False), (8, 40, 30, 60, False), (16, 20, 30, 60, True)])
def test_estimate_covers_the_measured_peak(batch, length, nt, t, per_sentence):
    # Measured, not assumed: the peak resident growth of a real forward+backward call in a
    # fresh process (VmHWM after a reset, Linux KiB) stays below the estimate the budget
    # relies on.
    # per_sentence: every sentence has its own rules (compound grammars).
    lead = "B, " if per_sentence else ""
    code = (
        PEAK_PROBE + "import torch\n"
        "from treewright import engine\n"
        f"B, N, NT, T = {batch}, {length}, {nt}, {t}\n"
        "S = NT + T\n"
        "root = torch.randn(NT).log_softmax(0)\n"
        f"binary = torch.randn({lead}NT, S * S).log_softmax(-1).view({lead}NT, S, S)\n"
        "term = torch.randn(B, N, T)\n"
        "base = reset_peak()\n"
        "engine.posteriors(root, binary, term, torch.full((B,), N))\n"
        "print((peak() - base) / 1024)\n")
    measured = _peak_mib(code)
    assert measured <= inside_outside_bytes(batch, length, nt, t,
                                            rules_per_sentence=per_sentence) / 2 ** 20


@pytest.mark.parametrize("batch,length,nt,t,rank", [(8, 30, 60, 120, 100), (4, 20, 250, 500, 500)])
def test_lowrank_estimate_covers_the_measured_peak(batch, length, nt, t, rank):
    # As above, for the low-rank kernel (engine.lowrank) and its own estimate.
    code = (
        PEAK_PROBE + "import torch\n"
        "from treewright.engine.lowrank import lowrank_log_partition\n"
        f"B, N, NT, T, R = {batch}, {length}, {nt}, {t}, {rank}\n"
        "S = NT + T\n"
        "root = torch.randn(NT).log_softmax(0)\n"
        "u = torch.randn(NT, R).log_softmax(1).requires_grad_()\n"
        "v = torch.randn(S, R).log_softmax(0).requires_grad_()\n"
        "w = torch.randn(S, R).log_softmax(0).requires_grad_()\n"
        "term = torch.randn(B, N, T)\n"
        # One call on two words first: it loads the compiled split loops (numba, about 130 MiB
        # of code and runtime, once per process), which no batch's estimate is meant to hold.
        "lowrank_log_partition(root, u, v, w, term[:1, :2], torch.full((1,), 2)).sum().backward()\n"
        "base = reset_peak()\n"
        "lowrank_log_partition(root, u, v, w, term, torch.full((B,), N)).sum().backward()\n"
        "print((peak() - base) / 1024)\n")
    measured = _peak_mib(code)
    estimate = inside_outside_bytes(batch, length, nt, t, rank=rank) / 2 ** 20
    assert measured <= estimate
    # Below the dense count the low-rank runs were budgeted with before. (Not checked against
    # the measurement from above: a call that reuses pages freed earlier in the process grows
    # the resident size by less than it uses.)
    assert estimate < inside_outside_bytes(batch, length, nt, t) / 2 ** 20


def test_training_with_200_word_sentences_stays_under_the_budget(tmp_path):
    words = [f"w{i}" for i in range(12)]
    lines = [" ".join(words[(k + j) % 12] for j in range(3 + k % 6)) for k in range(60)]
    lines += [" ".join(words[j % 12] for j in range(200))] * 2      # two 200-word sentences
    lines += [" ".join(words[j % 12] for j in range(600))]          # too long for the budget
    corpus = tmp_path / "train.txt"
    corpus.write_text("\n".join(lines) + "\n")
    budget = 150
    run = tmp_path / "run"
    config = tmp_path / "budget.yaml"
    config.write_text(f"data:\n  train: {corpus}\n  max_length: 1000\n"
                      "model:\n  nonterminals: 4\n  preterminals: 6\n"
                      f"train:\n  epochs: 1\n  memory_budget_mb: {budget}\n"
                      f"output:\n  run_dir: {run}\n")
    code = (
        "import resource, sys\n"
        "from treewright.cli import main\n"
        f"rc = main(['train', '{config}'])\n"
        "assert rc == 0\n"
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)\n")
    peak = _peak_mib(code)
    log = (run / "train.log").read_text()
    assert "1 longer training sentences set aside" in log
    # Generous bound: the budget plus an idle interpreter with torch and the library loaded.
    idle = _peak_mib("import resource, torch, treewright.train\n"
                     "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)\n")
    assert peak <= idle + budget
    assert (run / "grammar.pcfg").exists()
