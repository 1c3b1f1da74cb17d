"""Experiment trackers through accelerate's tracker interface: every PPO step's metrics, the resolved config
and the final summary go to the trackers named in `run.trackers` (TensorBoard, MLflow, and the others
accelerate supports). The run folder stays the record; trackers are a view for people who already use one.

Files go under `run.tracker_dir` (default trackers/): TensorBoard events in <tracker_dir>/<run folder name>/,
MLflow in a local file store <tracker_dir>/mlruns unless MLFLOW_TRACKING_URI names another store.
"""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from alignrun.config import Experiment, RunSection
from alignrun.errors import UserError

EXTRA = "trackers"  # pip install 'alignrun[trackers]': TensorBoard and MLflow
PACKAGE = {"tensorboard": "tensorboard", "mlflow": "mlflow-skinny", "wandb": "wandb", "trackio": "trackio",
           "comet_ml": "comet_ml", "aim": "aim", "clearml": "clearml", "dvclive": "dvclive", "swanlab": "swanlab"}


def tracker_dir(run: RunSection) -> Path:
    return Path(run.tracker_dir or "trackers")


def accelerator_options(run: RunSection) -> dict[str, Any]:
    """`log_with` and `project_dir` for Accelerator(...); a clear error when a tracker's package is missing
    (accelerate itself would drop it without a word)."""
    if not run.trackers:
        return {}
    from accelerate.tracking import get_available_trackers

    available = {str(t) for t in get_available_trackers()}
    missing = [name for name in run.trackers if name not in available]
    if missing:
        ours = [m for m in missing if m in ("tensorboard", "mlflow")]
        hint = [f"pip install 'alignrun[{EXTRA}]'"] if ours else []
        hint += [f"pip install {PACKAGE[m]}" for m in missing if m not in ours]
        raise UserError(f"run.trackers: {', '.join(missing)} {'is' if len(missing) == 1 else 'are'} not installed; "
                        f"install with {' and '.join(hint)}, or remove {'it' if len(missing) == 1 else 'them'} "
                        "from run.trackers")
    return {"log_with": list(run.trackers), "project_dir": str(tracker_dir(run))}


def flat_config(cfg: Experiment) -> dict[str, str | int | float | bool]:
    """The resolved config as dotted keys; lists, tables and None as JSON text (what trackers store as params)."""
    out: dict[str, str | int | float | bool] = {}

    def walk(node: dict[str, Any], prefix: str) -> None:
        for key, value in node.items():
            if isinstance(value, dict) and value:
                walk(value, f"{prefix}{key}.")
            else:
                keep = isinstance(value, (str, int, float, bool))
                out[f"{prefix}{key}"] = value if keep else json.dumps(value)

    walk(cfg.model_dump(mode="json"), "")
    return out


def numbers(tree: dict[str, Any], prefix: str = "") -> dict[str, float]:
    """The numeric leaves of a nested dict as "a/b/c" keys (booleans, text, lists and None left out)."""
    out: dict[str, float] = {}
    for key, value in tree.items():
        if isinstance(value, dict):
            out.update(numbers(value, f"{prefix}{key}/"))
        elif isinstance(value, (int, float)) and not isinstance(value, bool):
            out[f"{prefix}{key}"] = float(value)
    return out


@contextlib.contextmanager
def trackers(accelerator: Any, cfg: Experiment, out: Path) -> Iterator[None]:
    """Start the trackers with the resolved config; end them when the run ends, however it ends."""
    if not cfg.run.trackers:
        yield
        return
    if "mlflow" in cfg.run.trackers and "MLFLOW_TRACKING_URI" not in os.environ:
        import mlflow

        os.environ.setdefault("MLFLOW_ALLOW_FILE_STORE", "true")  # mlflow 3 asks for an opt-in to the file store
        mlflow.set_tracking_uri((tracker_dir(cfg.run).resolve() / "mlruns").as_uri())
    accelerator.init_trackers(Path(out).name, config=flat_config(cfg),
                              init_kwargs={"mlflow": {"run_name": Path(out).name}})
    try:
        yield
    except BaseException as exc:
        if "mlflow" in cfg.run.trackers and accelerator.is_main_process:
            import mlflow

            mlflow.end_run(status="KILLED" if isinstance(exc, KeyboardInterrupt) else "FAILED")
        raise
    finally:
        accelerator.end_training()


def log_step(accelerator: Any, row: dict[str, Any]) -> None:
    """One metrics.jsonl row, at its step."""
    accelerator.log(numbers({k: v for k, v in row.items() if k != "step"}), step=int(row["step"]))


def log_summary(accelerator: Any, report: dict[str, Any]) -> None:
    """The report's numbers (evaluation before/after/change, training, run, verdict) under summary/, at the
    last step; the config and the per-prompt arrays are left out (the config went in as parameters)."""
    summary = {k: v for k, v in report.items() if k not in ("config", "schema")}
    summary["evaluation"] = {k: v for k, v in report.get("evaluation", {}).items() if k != "per_prompt"}
    accelerator.log(numbers(summary, "summary/"), step=int(report.get("run", {}).get("steps", 0)))
