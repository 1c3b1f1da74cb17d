"""Before any model loads: do the files and folders the config names exist, and is the device there?

`alignrun config check` and every run call `check_inputs`, so a wrong path or a missing GPU is reported in
seconds, not after a preflight. Hub names and `module:function` sources are left to their loaders (checking
an import would run the user's code).
"""

from __future__ import annotations

from pathlib import Path

from alignrun.config import Experiment, ScorerSection
from alignrun.errors import UserError

PROBE_ROW = '{"text": "...", "harmful": true}'


def _local(source: str) -> Path | None:
    """A source that names a local path (absolute, ./ or ~/, or present); None for a hub name."""
    path = Path(source).expanduser()
    return path if path.is_absolute() or source.startswith((".", "~")) or path.exists() else None


def _model_folder(key: str, source: str) -> str | None:
    folder = _local(source)
    if folder is None:
        return None
    if not folder.exists():
        return f"{key}: folder {folder} does not exist; fix the path"
    if not folder.is_dir():
        return f"{key}: {folder} is a file, not a model folder (config.json, weights, tokenizer files)"
    if not (folder / "config.json").is_file():
        return f"{key}: {folder} has no config.json, so it is not a Hugging Face model folder"
    return None


def _scorer(key: str, section: ScorerSection) -> str | None:
    if section.backend == "hf":
        return _model_folder(f"{key}.source", section.source)
    if section.backend == "sklearn" and section.source.lower().endswith((".joblib", ".pkl", ".pickle")):
        path = Path(section.source).expanduser()
        if not path.is_file():
            return f"{key}.source: file {path} does not exist; expected a .joblib/.pkl fitted estimator"
    return None


def input_problems(cfg: Experiment) -> list[str]:
    """Every missing file or folder and an absent GPU, one line each."""
    problems = []
    for key, path in (("data.prompts", cfg.data.prompts), ("data.heldout", cfg.data.heldout)):
        if path is not None and not Path(path).exists():
            problems.append(f"[{key}] {path}: no such file or folder")
    for probe in cfg.reward.probes:
        if not Path(probe).is_file():
            problems.append(f"reward.probes: {probe} does not exist; expected a JSONL file with rows like {PROBE_ROW}")
    problems.append(_model_folder("base.model", cfg.base.model) or "")
    problems.append(_scorer("reward", cfg.reward) or "")
    if cfg.evaluation.judge is not None:
        problems.append(_scorer("evaluation.judge", cfg.evaluation.judge) or "")
    if cfg.base.device == "cuda":
        import torch

        if not torch.cuda.is_available():
            problems.append("base.device = 'cuda' but no GPU is visible; use 'auto' or 'cpu'")
    return [p for p in problems if p]


def check_inputs(cfg: Experiment) -> None:
    problems = input_problems(cfg)
    if len(problems) == 1:
        raise UserError(problems[0])
    if problems:
        raise UserError(f"{len(problems)} problems with what the config names:\n" + "\n".join(f"  {p}" for p in problems))
