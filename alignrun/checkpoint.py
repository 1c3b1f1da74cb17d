"""Checkpoints: the resumable state of a run (adapter, value head, optimiser, KL controller, every process's
random generators, data position = step), the in-memory snapshot a NaN/inf step is rolled back to, and the
metrics.jsonl rows a resume keeps."""

from __future__ import annotations

import copy
import json
import random
from pathlib import Path
from typing import Any

import numpy as np
import torch
from accelerate import Accelerator

from alignrun import ppo
from alignrun.errors import UserError
from alignrun.models import Policy, load_adapter_into, save_adapter
from alignrun.runfolder import read_json, replace_folder, staging_folder, write_json_atomic, write_text_atomic


def rng_state() -> dict[str, Any]:
    """This process's random number generators (torch CPU, Python, numpy) in a form torch.save keeps."""
    np_state: tuple[Any, ...] = np.random.get_state(legacy=True)  # type: ignore[assignment]
    return {"torch": torch.get_rng_state(), "python": random.getstate(),
            "numpy": [np_state[0], torch.from_numpy(np_state[1].astype(np.int64)), *np_state[2:]]}


def set_rng_state(state: dict[str, Any]) -> None:
    torch.set_rng_state(state["torch"])
    py = state["python"]
    random.setstate((py[0], tuple(py[1]), py[2]))
    npst = state["numpy"]
    np.random.set_state((npst[0], npst[1].numpy().astype(np.uint32), *npst[2:]))


def snapshot(net: torch.nn.Module, optimizer: torch.optim.Optimizer, controller: ppo.KLController) -> dict[str, Any]:
    """Everything a step changes: trainable weights (adapter, value head), optimiser state with its step counters,
    the KL controller and the random generators; `restore` puts it back after a NaN/inf mid-step."""
    return {"weights": {n: p.detach().clone() for n, p in net.named_parameters() if p.requires_grad},
            "optimizer": copy.deepcopy(optimizer.state_dict()), "kl_controller": controller.state_dict(),
            "rng": rng_state()}


def restore(state: dict[str, Any], net: torch.nn.Module, optimizer: torch.optim.Optimizer,
            controller: ppo.KLController) -> None:
    with torch.no_grad():
        for name, p in net.named_parameters():
            if p.requires_grad:
                p.copy_(state["weights"][name])
                p.grad = None
    optimizer.load_state_dict(state["optimizer"])
    controller.load_state_dict(state["kl_controller"])
    set_rng_state(state["rng"])


def all_rng_states(accelerator: Accelerator) -> list[dict[str, Any]]:
    """Every process's random generators, in process order (a collective call: every process must make it)."""
    if accelerator.num_processes == 1:
        return [rng_state()]
    states: list[Any] = [None] * accelerator.num_processes
    torch.distributed.all_gather_object(states, rng_state())
    return states


def save_checkpoint(folder: Path, policy: Policy, optimizer: torch.optim.Optimizer,
                    controller: ppo.KLController, step: int, rng: list[dict[str, Any]] | None = None) -> None:
    """Adapter, value head, optimiser, KL controller, every process's RNG states (`rng`, default this process's)
    and data position (= step), atomically."""
    tmp = staging_folder(folder)
    save_adapter(policy, tmp / "adapter")
    torch.save({"step": step, "optimizer": optimizer.state_dict(), "kl_controller": controller.state_dict(),
                "rng": rng or [rng_state()]}, tmp / "trainer_state.pt")
    write_json_atomic(tmp / "checkpoint.json", {"step": step})
    replace_folder(tmp, folder)


def load_checkpoint(folder: Path, policy: Policy, optimizer: torch.optim.Optimizer,
                    controller: ppo.KLController, process: int = 0, processes: int = 1) -> int:
    load_adapter_into(policy, folder / "adapter")
    state = torch.load(folder / "trainer_state.pt", weights_only=True)
    if "rng" not in state:  # written before every process's RNG was kept: one process's, under three keys
        state["rng"] = [{key: state[f"rng_{key}"] for key in ("torch", "python", "numpy")}]
    if len(state["rng"]) != processes:
        raise UserError(f"{folder}: the checkpoint was written by {len(state['rng'])} process(es); resume it with "
                        f"the same number (now {processes})")
    optimizer.load_state_dict(state["optimizer"])
    controller.load_state_dict(state["kl_controller"])
    set_rng_state(state["rng"][process])
    return int(state["step"])


def save_on_main(accelerator: Accelerator, folder: Path, policy: Policy, optimizer: torch.optim.Optimizer,
                controller: ppo.KLController, step: int) -> None:
    """save_checkpoint from the main process with every process's RNG (call it on every process)."""
    states = all_rng_states(accelerator)
    if accelerator.is_main_process:
        save_checkpoint(folder, policy, optimizer, controller, step, states)


def truncate_metrics(path: Path, step: int) -> None:
    keep = [row for row in read_metrics(path) if row["step"] <= step]
    write_text_atomic(path, "".join(json.dumps(row) + "\n" for row in keep))


def checkpoint_step(ckpt: Path) -> int:
    """The step of the complete checkpoint in `ckpt`, 0 when there is none."""
    path = ckpt / "checkpoint.json"
    if not path.exists():
        return 0
    saved = read_json(path, "checkpoint record")
    if not isinstance(saved, dict) or not isinstance(saved.get("step"), int):
        raise UserError(f"{path}: not a checkpoint record ({{\"step\": N}}); the checkpoint is damaged: restore it, "
                        f"or delete {ckpt} to restart training from step 0 with --resume")
    return saved["step"]


def saved_step(ckpt: Path) -> int:
    """The checkpoint step a resume starts from; 0 when the checkpoint is missing or unreadable."""
    try:
        return checkpoint_step(ckpt)
    except UserError:
        return 0


def read_metrics(path: Path) -> list[dict[str, float]]:
    """metrics.jsonl rows; a torn last line (a crash mid-append) is dropped, its step is redone on resume."""
    if not path.exists():
        return []
    try:
        lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if ln.strip()]
    except UnicodeDecodeError:
        raise UserError(f"{path}: not UTF-8 text; the metrics file is damaged: restore it, or start a new run "
                        "with another --out") from None
    rows = []
    for n, line in enumerate(lines, 1):
        try:
            rows.append(json.loads(line))
        except json.JSONDecodeError:
            if n == len(lines):
                break
            raise UserError(f"{path}: line {n} is not valid JSON; the metrics file is damaged: restore it, or start "
                            "a new run with another --out") from None
    return rows
