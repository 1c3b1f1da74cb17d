"""Experiment trackers through accelerate: what a run logs is read back with each tracker's own reader
(TensorBoard's EventAccumulator, MLflow's MlflowClient on a file: store), offline."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from alignrun import tracking
from alignrun.config import RunSection, load_config
from alignrun.errors import UserError
from tests.tiny_run import read_jsonl, write_tiny_experiment


def _tensorboard_scalars(folder: Path) -> dict[str, list[tuple[int, float]]]:
    """Every scalar under folder, by tag, read with TensorBoard's own event reader."""
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    out: dict[str, list[tuple[int, float]]] = {}
    for events in sorted({p.parent for p in folder.rglob("events.out.tfevents.*")}):
        acc = EventAccumulator(str(events), size_guidance={"scalars": 0})
        acc.Reload()
        for tag in acc.Tags()["scalars"]:
            out.setdefault(tag, []).extend((e.step, e.value) for e in acc.Scalars(tag))
    return out


def _mlflow_run(store: Path, experiment: str):
    from mlflow.tracking import MlflowClient

    client = MlflowClient(store.resolve().as_uri())
    found = client.get_experiment_by_name(experiment)
    assert found is not None, f"no MLflow experiment {experiment!r} in {store}"
    (run,) = client.search_runs([found.experiment_id])
    return client, run


@pytest.fixture
def tracker_packages(monkeypatch: pytest.MonkeyPatch) -> None:
    pytest.importorskip("tensorboard")
    pytest.importorskip("mlflow")
    monkeypatch.delenv("MLFLOW_TRACKING_URI", raising=False)
    monkeypatch.delenv("MLFLOW_EXPERIMENT_NAME", raising=False)
    monkeypatch.delenv("MLFLOW_RUN_ID", raising=False)


def test_missing_tracker_package_names_the_extra(monkeypatch: pytest.MonkeyPatch) -> None:
    import accelerate.tracking

    monkeypatch.setattr(accelerate.tracking, "get_available_trackers", lambda: [])
    with pytest.raises(UserError, match=r"run.trackers: tensorboard, mlflow are not installed.*alignrun\[trackers\]"):
        tracking.accelerator_options(RunSection(trackers=["tensorboard", "mlflow"]))
    with pytest.raises(UserError, match=r"wandb is not installed; install with pip install wandb"):
        tracking.accelerator_options(RunSection(trackers=["wandb"]))
    assert tracking.accelerator_options(RunSection()) == {}  # no trackers: accelerate is left as it was


def test_unknown_tracker_name_is_a_config_error(tmp_path: Path, tiny_models) -> None:
    exp = write_tiny_experiment(tmp_path, tiny_models["t5"])
    with pytest.raises(UserError, match=r"run.trackers"):
        load_config(exp.config, ["run.trackers=['tensorbord']"])


@pytest.mark.slow
def test_run_logs_steps_config_and_summary_to_tensorboard_and_mlflow(tmp_path: Path, tiny_models,
                                                                     tracker_packages) -> None:
    from alignrun.trainer import run_experiment

    exp = write_tiny_experiment(tmp_path / "exp", tiny_models["t5"], steps=3)
    store = tmp_path / "trackers"
    cfg = load_config(exp.config, ["run.trackers=['tensorboard', 'mlflow']", f"run.tracker_dir='{store}'"])
    out = tmp_path / "tracked-run"
    report = run_experiment(cfg, out, quiet=True)
    rows = read_jsonl(out / "metrics.jsonl")
    assert [r["step"] for r in rows] == [1, 2, 3]
    before_mean = report["evaluation"]["before"]["reward_classifier"]["mean"]

    # TensorBoard: one point per step for every metric, equal to metrics.jsonl (stored as float32)
    scalars = _tensorboard_scalars(store / "tracked-run")
    for key in ("reward_mean", "kl_mean", "beta", "policy_loss", "entropy"):
        assert [s for s, _ in scalars[key]] == [1, 2, 3], key
        assert [v for _, v in scalars[key]] == pytest.approx([r[key] for r in rows], rel=1e-6, abs=1e-7), key
    assert scalars["summary/evaluation/before/reward_classifier/mean"] == [(3, pytest.approx(before_mean, rel=1e-6))]
    hparams = json.dumps(sorted(p.name for p in (store / "tracked-run").rglob("*")))
    assert "hparams.yml" in hparams  # accelerate's record of the config beside the events

    # MLflow (file: store): the resolved config as parameters, each step's metrics, the summary, status
    client, run = _mlflow_run(store / "mlruns", "tracked-run")
    assert run.info.status == "FINISHED" and run.info.run_name == "tracked-run"
    assert run.data.params["ppo.steps"] == "3" and run.data.params["lora.rank"] == "4"
    assert run.data.params["run.trackers"] == '["tensorboard", "mlflow"]'
    history = client.get_metric_history(run.info.run_id, "reward_mean")
    assert [(m.step, m.value) for m in sorted(history, key=lambda m: m.step)] == \
        [(r["step"], pytest.approx(r["reward_mean"])) for r in rows]
    assert run.data.metrics["summary/evaluation/before/reward_classifier/mean"] == pytest.approx(before_mean)
    assert run.data.metrics["summary/training/final_kl"] == pytest.approx(report["training"]["final_kl"])


def test_failed_run_is_marked_failed_in_mlflow(tmp_path: Path, tracker_packages) -> None:
    """A run that stops with an error ends its MLflow run as FAILED, not FINISHED (no models needed)."""
    from accelerate import Accelerator

    from alignrun.config import Experiment

    store = tmp_path / "trackers"
    cfg = Experiment.model_validate({
        "base": {"model": "unused"}, "reward": {"backend": "callable", "source": "m:f"}, "data": {"prompts": "p"},
        "run": {"trackers": ["mlflow"], "tracker_dir": str(store)}})
    accelerator = Accelerator(cpu=True, **tracking.accelerator_options(cfg.run))
    with pytest.raises(RuntimeError, match="boom"), tracking.trackers(accelerator, cfg, tmp_path / "broken-run"):
        tracking.log_step(accelerator, {"step": 1, "reward_mean": 0.25, "note": "text is left out"})
        raise RuntimeError("boom")
    client, run = _mlflow_run(store / "mlruns", "broken-run")
    assert run.info.status == "FAILED"
    assert [(m.step, m.value) for m in client.get_metric_history(run.info.run_id, "reward_mean")] == [(1, 0.25)]
    assert "note" not in run.data.metrics
