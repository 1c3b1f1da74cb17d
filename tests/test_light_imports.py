"""Commands that only read saved files do not load the training stack (torch and friends take seconds)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from tests.test_compare import make_run
from tests.tiny_run import cli_env

TRAINING_STACK = ("torch", "transformers", "peft", "trl", "accelerate", "datasets", "evaluate")

# Runs the command line in-process, then lists which training-stack packages it imported.
PROBE = f"""
import json, sys
from alignrun.cli import main
code = main(sys.argv[1:])
print(json.dumps({{"code": code, "loaded": [m for m in {TRAINING_STACK!r} if m in sys.modules]}}))
"""


def _loaded(args: list[str]) -> dict:
    done = subprocess.run([sys.executable, "-c", PROBE, *args], env=cli_env(), capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_importing_compare_leaves_the_training_stack_unloaded() -> None:
    done = subprocess.run([sys.executable, "-c", "import sys, alignrun.compare, alignrun.html_report; "
                           f"print([m for m in {TRAINING_STACK!r} if m in sys.modules])"],
                          env=cli_env(), capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_compare_with_plots_and_html_report_never_loads_the_training_stack(tmp_path: Path) -> None:
    for name, effect in (("a", 0.1), ("b", 0.3)):
        (tmp_path / name).mkdir()
        make_run(tmp_path / name, effect=effect, drift=effect)
    result = _loaded(["compare", str(tmp_path / "a"), str(tmp_path / "b"), "--plot", str(tmp_path / "plots"),
                      "--report", str(tmp_path / "cmp.html")])
    assert result == {"code": 0, "loaded": []}
    assert (tmp_path / "cmp.html").is_file()
