"""The allocator tuning of the entry points (treewright/allocator.py).

Source for the expected behaviour: the mallopt(3) manual page (from memory): mallopt returns 1
on success, and glibc reads MALLOC_TRIM_THRESHOLD_ / MALLOC_MMAP_THRESHOLD_ from the environment
at start-up, which the function must leave in charge.
"""

import os
import subprocess
import sys

import pytest

CODE = "from treewright.allocator import tune_allocator; print(tune_allocator(), tune_allocator())"


def _run(env_extra: dict) -> str:
    env = {k: v for k, v in os.environ.items()
           if k not in ("MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_", "GLIBC_TUNABLES")}
    env.update(env_extra)
    return subprocess.run([sys.executable, "-c", CODE], env=env, capture_output=True, text=True,
                          check=True).stdout.strip()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt")
def test_tuning_takes_effect_once_per_process():
    assert _run({}) == "True True"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt")
def test_user_settings_of_glibc_take_precedence():
    assert _run({"MALLOC_TRIM_THRESHOLD_": "131072"}) == "False False"


def test_the_cli_module_does_not_import_torch_for_it():
    # The CLI calls tune_allocator before a command runs; `treewright --help` stays light.
    out = subprocess.run([sys.executable, "-c", "import sys, treewright.allocator; "
                          "print('torch' in sys.modules)"], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "False"
