"""What commands show: library bars and hub chatter hidden unless --debug; evaluation counts its replies."""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import torch

from alignrun import evaluation
from alignrun.config import load_config
from alignrun.models import build_policy
from tests.tiny_run import cli_env, write_tiny_experiment

# Loads and saves a model the way alignrun does, and logs what huggingface_hub logs while it retries offline.
LIBRARY_WORK = textwrap.dedent("""
    import logging, sys
    from alignrun import console
    console.setup(debug=sys.argv[3] == "debug")
    from transformers import AutoModelForSeq2SeqLM
    AutoModelForSeq2SeqLM.from_pretrained(sys.argv[1]).save_pretrained(sys.argv[2])
    logging.getLogger("huggingface_hub.utils._http").warning("Retrying in 1s [Retry 1/5].")
""")


@pytest.mark.parametrize("mode", ["default", "debug"])
def test_library_noise_only_under_debug(tmp_path: Path, tiny_models, mode: str) -> None:
    env = cli_env()
    for name in ("ALIGNRUN_DEBUG", "TRANSFORMERS_VERBOSITY", "HF_HUB_VERBOSITY", "HF_HUB_DISABLE_PROGRESS_BARS"):
        env.pop(name, None)
    done = subprocess.run([sys.executable, "-c", LIBRARY_WORK, str(tiny_models["t5"]), str(tmp_path / "copy"), mode],
                          env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "copy" / "model.safetensors").is_file()
    noise = ("Loading weights", "Writing model shards", "Retrying in 1s")
    if mode == "debug":
        assert all(n in done.stderr for n in noise), done.stderr
    else:
        assert done.stderr == ""


def test_evaluation_progress_counts_every_reply(tmp_path: Path, tiny_models) -> None:
    cfg = load_config(write_tiny_experiment(tmp_path, tiny_models["t5"]).config,
                      ["evaluation.samples_per_prompt=3"])
    policy = build_policy(cfg.base, cfg.lora, cfg.reference, torch.device("cpu"))
    scorer = SimpleNamespace(score=lambda texts: SimpleNamespace(harm=np.zeros(len(texts))))
    counted: list[int] = []
    prompts = [f"Is the Wren frame {i} ready?" for i in range(70)]  # more than one generation chunk (64)
    evaluation.evaluate_policy(policy, prompts, scorer, None, cfg, torch.device("cpu"),
                               SimpleNamespace(update=counted.append))
    assert sum(counted) == 70 * 3 + 70  # k sampled replies and one greedy reply per prompt
    assert len(counted) > 2  # in chunks, as generation goes
