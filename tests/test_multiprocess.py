"""The same run as two CPU processes (gloo) under torchrun, with accelerate splitting the global batch."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.tiny_run import build_tiny_models, cli_env, read_jsonl, write_tiny_experiment


@pytest.mark.slow
def test_two_process_run_under_torchrun(tmp_path: Path) -> None:
    models = build_tiny_models(tmp_path / "models")
    exp = write_tiny_experiment(tmp_path / "exp", models.base, steps=2, checkpoint_every=0)
    out = tmp_path / "run"
    cmd = [sys.executable, "-m", "torch.distributed.run", "--nproc_per_node", "2", "-m", "alignrun",
           "run", str(exp.config), "--out", str(out), "--quiet"]
    done = subprocess.run(cmd, cwd=exp.folder, env=cli_env(), capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    assert json.loads((out / "environment.json").read_text())["processes"] == 2
    assert json.loads((out / "status.json").read_text())["state"] == "finished"
    assert [row["step"] for row in read_jsonl(out / "metrics.jsonl")] == [1, 2]  # one writer, no interleaving
    assert json.loads((out / "report.json").read_text())["run"]["steps"] == 2
