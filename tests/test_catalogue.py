"""Bad-input catalogue: every row is one user mistake fed to the real command line.

For each row: a non-zero exit code, exactly one error message that names the culprit (file, key or row)
and the fix, no traceback unless --debug, and nothing partial presented as complete (no report.json for a
failed run; status.json says "failed" when this run created the folder; an existing run is left untouched).
Where the point is that nothing changed, every file under the guarded path is hashed (SHA-256) before and
after the command; where a damaged file stops a resume, status.json must keep the run's last true state.

Most rows call `alignrun.cli.main(argv)` in-process (the same code path as the `alignrun` script, minus
interpreter start-up); the SUBPROCESS rows and the --debug test run `python -m alignrun` for real.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import re
import shutil
import socket
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from alignrun.cli import main
from tests import tiny_run

# ------------------------------------------------------------------------------------------ harness


class Workspace:
    """One test's folder: a valid tiny experiment that each row breaks in one way."""

    def __init__(self, root: Path, models: dict[str, Path], classifiers: dict[str, Path],
                 monkeypatch: pytest.MonkeyPatch):
        self.root, self.models, self.classifiers, self.monkeypatch = root, models, classifiers, monkeypatch
        self.prompts = tiny_run.write_prompts(root / "prompts.jsonl")
        self.out = root / "run"
        self.cfg = root / "exp.toml"

    def body(self) -> dict[str, Any]:
        return tiny_run.tiny_config(self.models["t5"], self.prompts)

    def config(self, *edits: tuple[str, Any], body: dict[str, Any] | None = None, name: str = "exp.toml") -> Path:
        """The valid config with dotted keys set (value DELETE removes the key)."""
        body = body or self.body()
        for key, value in edits:
            *parents, last = key.split(".")
            node = body
            for part in parents:
                node = node.setdefault(part, {})
            if value is DELETE:
                node.pop(last, None)
            else:
                node[last] = value
        return tiny_run.write_config(self.root / name, body)

    def file(self, name: str, content: str | bytes) -> Path:
        path = self.root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
        return path

    def run(self, *edits: tuple[str, Any], extra: tuple[str, ...] = ()) -> list[str]:
        """argv of `alignrun run` on the config with edits, into self.out."""
        return ["run", str(self.config(*edits)), "--out", str(self.out), "--quiet", *extra]

    def data(self, name: str, content: str | bytes, *edits: tuple[str, Any]) -> list[str]:
        """argv of a run whose data.prompts is a file with this content."""
        return self.run(("data.prompts", str(self.file(name, content))), *edits)


DELETE = object()


@dataclass(frozen=True)
class Case:
    id: str
    group: str
    argv: Callable[[Workspace], list[str]]
    needles: tuple[str, ...]  # all must appear in stderr; "{out}", "{root}" are filled in
    code: int = 2
    subprocess: bool = False
    existing_run: bool = False  # the run folder holds a finished run before the command: it must stay intact
    status_written: bool = True  # False when the failure is that nothing can be written
    marks: tuple[Any, ...] = field(default_factory=tuple)
    guarded: Callable[[Workspace], Path] | None = None  # a file or folder hashed before and after: unchanged
    status_after: tuple[str, int] | None = None  # (state, step) status.json must still say afterwards
    absent: tuple[str, ...] = ()  # advice that would be wrong here and must not appear


def fake_finished_run(ws: Workspace, *, status: bool = True) -> None:
    """The files of a finished run (status.json optional); the adapter is a stand-in, enough for refusals."""
    ws.out.mkdir()
    if status:
        (ws.out / "status.json").write_text(json.dumps({"state": "finished", "step": 5}))
    (ws.out / "report.json").write_text(json.dumps({"schema": "alignrun.report/1", "marker": "kept"}))
    (ws.out / "config.toml").write_text(ws.config().read_text())
    (ws.out / "metrics.jsonl").write_text(json.dumps({"step": 1, "reward_mean": 0.5}) + "\n")
    (ws.out / "adapter").mkdir()
    (ws.out / "adapter" / "adapter_config.json").write_text("{}")


def fake_interrupted_run(ws: Workspace, *, checkpoint: bytes | None = None, metrics: bytes = b"") -> list[str]:
    """A run interrupted at step 4 (status.json says so), with optionally a checkpoint whose trainer_state.pt
    holds these bytes (no adapter); returns the argv that resumes it."""
    ws.out.mkdir()
    (ws.out / "status.json").write_text(json.dumps({"state": "interrupted", "step": 4}))
    (ws.out / "config.toml").write_text(ws.config().read_text())
    (ws.out / "metrics.jsonl").write_bytes(metrics)
    if checkpoint is not None:
        (ws.out / "checkpoint").mkdir()
        (ws.out / "checkpoint" / "checkpoint.json").write_text(json.dumps({"step": 4}))
        (ws.out / "checkpoint" / "trainer_state.pt").write_bytes(checkpoint)
    return ws.run(extra=("--resume", str(ws.out)))


def own_base(ws: Workspace) -> Path:
    """A copy of the tiny base model that this test may lose; the fake run's config names it."""
    folder = ws.root / "base-copy"
    if not folder.exists():
        shutil.copytree(ws.models["t5"], folder)
    return folder


def fake_run_on_own_base(ws: Workspace) -> None:
    ws.out.mkdir()
    ws.config(("base.model", str(own_base(ws))), name="own.toml")
    (ws.out / "config.toml").write_text((ws.root / "own.toml").read_text())
    (ws.out / "adapter").mkdir()
    (ws.out / "adapter" / "adapter_config.json").write_text("{}")


def damaged_base(ws: Workspace, name: str, damage: Callable[[bytes], bytes]) -> Path:
    folder = ws.root / f"t5-damaged-{name.replace('.', '-')}"
    shutil.copytree(ws.models["t5"], folder)
    (folder / name).write_bytes(damage((folder / name).read_bytes()))
    return folder


def dead_running_run(ws: Workspace) -> Path:
    """A run SIGKILLed at step 2: status.json still says running, the lock names a process that is gone."""
    ws.out.mkdir(parents=True)
    (ws.out / "status.json").write_text(json.dumps({"state": "running", "step": 2}))
    (ws.out / "config.toml").write_text(ws.config().read_text())
    (ws.out / ".lock").write_text(json.dumps({"pid": _finished_pid(), "host": socket.gethostname(),
                                              "since": "2030-01-01T00:00:00"}))
    return ws.out


def sweep_with_dead_trial(ws: Workspace) -> Path:
    """A sweep killed while its one trial ran: sweep.json still says pending, the trial's status says running."""
    from alignrun.sweep import SCHEMA

    ws.out = ws.root / "sweep" / "t1"
    dead_running_run(ws)
    (ws.root / "sweep" / "sweep.json").write_text(json.dumps(
        {"schema": SCHEMA, "trials": [{"name": "t1", "folder": "t1", "state": "pending", "error": None}]}))
    return ws.root / "sweep"


def _finished_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def sweep_with_finished_trial(ws: Workspace, report: str, status: bool) -> list[str]:
    """A sweep folder whose one trial (kl.coef = 0.1) finished; its report.json holds `report`."""
    from alignrun.sweep import trial_name

    trial = ws.root / "sweep" / trial_name({"kl.coef": 0.1})
    trial.mkdir(parents=True)
    (ws.root / "sweep" / "sweep.json").write_text("{}")
    (trial / "report.json").write_text(report)
    if status:
        (trial / "status.json").write_text(json.dumps({"state": "finished", "step": 5}))
    return ["sweep", str(sweep_config(ws, {"kl.coef": [0.1]})), "--out", str(ws.root / "sweep")]


def sweep_config(ws: Workspace, grid: dict[str, Any] | None) -> Path:
    body = ws.body()
    if grid is not None:
        body["sweep"] = {"grid": grid}
    return tiny_run.write_config(ws.root / "sweep.toml", body)


CONSTANT_REWARD = ("reward.source", f"{tiny_run.MODULE}:constant_harm")


def failed_preflight_run(ws: Workspace) -> None:
    """A run into ws.out that stops at the polarity preflight (exit 3), before any training."""
    assert main(ws.run(CONSTANT_REWARD)) == 3


def disk_full_for(ws: Workspace, names: set[str] | None) -> None:
    """os.replace into the run folder fails with ENOSPC (for the listed file names, or for all)."""
    real = os.replace

    def replace(src: Any, dst: Any, *args: Any, **kwargs: Any) -> None:
        target = Path(dst)
        if target.parent == ws.out and (names is None or target.name in names):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(target))
        real(src, dst, *args, **kwargs)

    ws.monkeypatch.setattr(os, "replace", replace)


def base_without_tokenizer(ws: Workspace) -> Path:
    folder = ws.root / "t5-no-tokenizer"
    shutil.copytree(ws.models["t5"], folder)
    for f in folder.iterdir():
        if f.name.startswith(("tokenizer", "special_tokens")):
            f.unlink()
    return folder


def classifier_without_tokenizer(ws: Workspace) -> Path:
    folder = ws.root / "clf-no-tokenizer"
    shutil.copytree(ws.classifiers["named"], folder)
    for f in folder.iterdir():
        if f.name.startswith(("tokenizer", "special_tokens", "vocab")):
            f.unlink()
    return folder


def hf_reward(source: Path | str, **extra: Any) -> list[tuple[str, Any]]:
    return [("reward.backend", "hf"), ("reward.source", str(source)), *((f"reward.{k}", v) for k, v in extra.items())]


def make_cycle(ws: Workspace) -> Path:
    ws.file("b.toml", 'extends = "a.toml"\n')
    return ws.file("a.toml", 'extends = "b.toml"\n')


def corrupt_config(ws: Workspace) -> Path:
    folder = ws.root / "broken-model"
    shutil.copytree(ws.models["t5"], folder)
    (folder / "config.json").write_text("{ this is not json")
    return folder


def read_only_out(ws: Workspace) -> list[str]:
    ws.out.mkdir()
    ws.out.chmod(0o555)
    return ws.run()


def nan_config(ws: Workspace) -> list[str]:
    text = ws.config().read_text().replace("coef = 0.05", "coef = nan")
    assert "coef = nan" in text
    return ["run", str(ws.file("nan.toml", text)), "--out", str(ws.out), "--quiet"]


def _has_gpu() -> bool:
    import torch

    return torch.cuda.is_available()


M = tiny_run.MODULE
ROOT_XFAIL = "run as root: os.access says every folder is writable, so a chmod cannot simulate a read-only folder"

CASES: list[Case] = [
    # ------------------------------------------------------------------------------- config
    Case("config-missing-file", "config", lambda ws: ["run", str(ws.root / "nope.toml")],
         ("{root}/nope.toml", "config file not found", "check the path")),
    Case("config-is-folder", "config", lambda ws: ["run", str(ws.root)], ("{root}", "is a folder", "TOML")),
    Case("config-bad-toml", "config", lambda ws: ["run", str(ws.file("bad.toml", "[ppo\nsteps = 3\n"))],
         ("bad.toml", "not valid TOML", "line 1")),
    Case("config-binary", "config", lambda ws: ["run", str(ws.file("bin.toml", b"\xff\xfe\x00\x81 = 1"))],
         ("bin.toml", "not a text file", "UTF-8")),
    Case("config-wrong-type", "config", lambda ws: ws.run(("ppo.steps", "five")),
         ("exp.toml", "'ppo.steps'", "'five'", "integer")),
    Case("config-float-for-int", "config", lambda ws: ws.run(("ppo.steps", 2.5)), ("'ppo.steps'", "2.5", "integer")),
    Case("config-bool-for-int", "config", lambda ws: ws.run(("lora.rank", True)), ("'lora.rank'", "True", "integer")),
    Case("config-out-of-range", "config", lambda ws: ws.run(("ppo.clip_epsilon", 1.5)),
         ("'ppo.clip_epsilon'", "1.5", "less than 1")),
    Case("config-zero-rank", "config", lambda ws: ws.run(("lora.rank", 0)), ("'lora.rank'", "0", "greater than or equal to 1")),
    Case("config-nan", "config", nan_config, ("nan.toml", "'kl.coef'", "nan", "finite number")),
    Case("config-unknown-key", "config", lambda ws: ws.run(("ppo.stepz", 3)),
         ("exp.toml", "unknown key 'ppo.stepz'", "did you mean 'steps'")),
    Case("config-unknown-section", "config", lambda ws: ws.run(("ppoo", {"steps": 3})),
         ("unknown key 'ppoo'", "did you mean 'ppo'")),
    Case("config-missing-required", "config", lambda ws: ws.run(("base.model", DELETE)),
         ("exp.toml", "required key 'base.model' is missing")),
    Case("config-empty-model", "config", lambda ws: ws.run(("base.model", "")), ("'base.model'", "''", "at least 1 character")),
    Case("config-minibatch-divides", "config", lambda ws: ws.run(("ppo.minibatch", 3)),
         ("[ppo]", "minibatch (3) must divide prompts_per_step (4)", "try minibatch = 2")),
    Case("config-group-method-one-reply", "config", lambda ws: ws.run(("method.name", "grpo")),
         ("exp.toml", "[method]", "samples_per_prompt >= 2 (it is 1)", "method.samples_per_prompt = 4")),
    Case("config-labels-and-index", "config",
         lambda ws: ws.run(("reward.harmful_labels", ["x"]), ("reward.harmful_index", 1)),
         ("[reward]", "either harmful_labels or harmful_index, not both")),
    Case("config-bad-literal", "config", lambda ws: ws.run(("reference.mode", "frozen")),
         ("'reference.mode'", "'frozen'", "'adapters-off' or 'copy'")),
    Case("config-extends-cycle", "config", lambda ws: ["config", "check", str(make_cycle(ws))],
         ("'extends' makes a cycle", "a.toml -> ", "b.toml", "remove one of the 'extends' lines")),
    Case("config-extends-missing", "config",
         lambda ws: ["config", "check", str(ws.file("child.toml", 'extends = "parent.toml"\n'))],
         ("child.toml", "'extends' names", "parent.toml", "does not exist")),
    Case("config-extends-not-string", "config",
         lambda ws: ["config", "check", str(ws.file("child.toml", "extends = 3\n"))],
         ("child.toml", "'extends' must be a file name", "3")),
    Case("set-without-equals", "config", lambda ws: ws.run(extra=("--set", "ppo.steps")),
         ("--set 'ppo.steps'", "expected KEY=VALUE", "--set kl.coef=0.1")),
    Case("set-empty-key-part", "config", lambda ws: ws.run(extra=("--set", "ppo..steps=3")),
         ("--set 'ppo..steps=3'", "expected KEY=VALUE")),
    Case("set-into-a-value", "config", lambda ws: ws.run(extra=("--set", "ppo.steps.max=3")),
         ("--set 'ppo.steps.max=3'", "'ppo.steps' is a value, not a section")),
    Case("set-unknown-key", "config", lambda ws: ws.run(extra=("--set", "kl.coeff=0.2")),
         ("--set kl.coeff=0.2", "unknown key 'kl.coeff'", "did you mean 'coef'")),
    Case("set-wrong-type", "config", lambda ws: ws.run(extra=("--set", "ppo.steps=many")),
         ("--set ppo.steps=many", "'ppo.steps'", "'many'", "integer")),
    Case("config-check-subprocess", "config", lambda ws: ["config", "check", str(ws.config(("kl.coef", -1.0)))],
         ("exp.toml", "'kl.coef'", "-1.0", "greater than or equal to 0"), subprocess=True),
    # --------------------------------------------------------------------------------- data
    Case("data-missing-file", "data", lambda ws: ws.run(("data.prompts", str(ws.root / "absent.jsonl"))),
         ("[data.prompts]", "absent.jsonl", "no such file")),
    Case("data-empty-file", "data", lambda ws: ws.data("empty.jsonl", ""),
         ("[data.prompts]", "empty.jsonl", "empty file", "field 'prompt'")),
    Case("data-blank-lines-only", "data", lambda ws: ws.data("blank.jsonl", "\n\n  \n"),
         ("[data.prompts]", "blank.jsonl", "no rows")),
    Case("data-bad-json-line", "data", lambda ws: ws.data("bad.jsonl", '{"prompt": "a"}\n{"prompt": "b"}\n{"prompt": \n'),
         ("bad.jsonl", "not valid JSON Lines", "line 3")),
    Case("data-row-not-object", "data", lambda ws: ws.data("list.jsonl", '{"prompt": "a"}\n"just text"\n'),
         ("list.jsonl", "line 2", "not a JSON object", '{"prompt": "..."}')),
    Case("data-wrong-field", "data", lambda ws: ws.data("field.jsonl", '{"text": "a"}\n{"text": "b"}\n'),
         ("field.jsonl", "no field 'prompt'", "data.text_field", "fields found: text")),
    Case("data-null-prompt", "data", lambda ws: ws.data("null.jsonl", '{"prompt": "a"}\n{"prompt": null}\n{"prompt": "c"}\n'),
         ("null.jsonl", "line 2", "missing or null", 'data.bad_rows = "skip"')),
    Case("data-number-prompt", "data", lambda ws: ws.data("num.jsonl", '{"prompt": "a"}\n{"prompt": 42}\n'),
         ("num.jsonl", "line 2", "not text: int", 'data.bad_rows = "skip"')),
    Case("data-huge-row", "data", lambda ws: ws.data("huge.jsonl", '{"prompt": "a"}\n' + json.dumps({"prompt": "x" * 300_000}) + "\n"),
         ("huge.jsonl", "line 2", "300000 characters", "data.max_chars = 2000")),
    Case("data-binary", "data", lambda ws: ws.data("bin.jsonl", bytes(range(256)) * 40),
         ("bin.jsonl", "binary data", "JSON Lines")),
    Case("data-invalid-utf8", "data", lambda ws: ws.data("latin1.jsonl", '{"prompt": "ok"}\n{"prompt": "caf\xe9"}\n'.encode("latin-1")),
         ("latin1.jsonl", "line 2", "not valid UTF-8")),
    Case("data-unknown-extension", "data", lambda ws: ws.data("prompts.txt", "hello\nworld\n"),
         ("prompts.txt", "unknown file type '.txt'", ".jsonl")),
    Case("data-one-prompt", "data", lambda ws: ws.data("one.jsonl", '{"prompt": "a"}\n{"prompt": "a"}\n'),
         ("[data.prompts]", "one.jsonl", "1 usable distinct prompt", "data.heldout")),
    Case("data-all-rows-skipped", "data",
         lambda ws: ws.data("allbad.jsonl", '{"prompt": ""}\n{"prompt": "   "}\n', ("data.bad_rows", "skip")),
         ("[data.prompts]", "allbad.jsonl", "every row was skipped as bad (2 rows)")),
    Case("data-csv-missing-column", "data", lambda ws: ws.data("p.csv", "question,id\nwhere is it?,1\nwhy?,2\n"),
         ("p.csv", "no field 'prompt'", "fields found: question, id")),
    Case("data-parquet-not-parquet", "data", lambda ws: ws.data("p.parquet", "this is not parquet\n"),
         ("p.parquet", "could not be read as Parquet")),
    Case("data-heldout-missing", "data", lambda ws: ws.run(("data.heldout", str(ws.root / "held.jsonl"))),
         ("[data.heldout]", "held.jsonl", "no such file")),
    Case("data-plain-folder", "data", lambda ws: ws.run(("data.prompts", str(ws.root))),
         ("[data.prompts]", "not a folder written by datasets' save_to_disk", "name the file itself")),
    # ------------------------------------------------------------------------------- models
    Case("base-missing-folder", "models", lambda ws: ws.run(("base.model", str(ws.root / "no-model"))),
         ("base.model", "{root}/no-model", "does not exist")),
    Case("base-is-classifier", "models", lambda ws: ws.run(("base.model", str(ws.classifiers["named"]))),
         ("base.model", "'bert' model, not an encoder-decoder", "T5-, BART-")),
    Case("base-causal-no-tokenizer", "models", lambda ws: ws.run(("base.model", str(ws.classifiers["gpt2"]))),
         ("base.model", "gpt2", "no tokenizer files", "save the tokenizer into the model folder")),
    Case("base-no-tokenizer", "models", lambda ws: ws.run(("base.model", str(base_without_tokenizer(ws)))),
         ("base.model", "t5-no-tokenizer", "tokenizer", "save the tokenizer into the model folder")),
    Case("base-corrupt-config", "models",
         lambda ws: ws.run(("base.model", str(corrupt_config(ws)))), ("base.model", "broken-model", "config.json")),
    Case("reward-folder-missing", "models", lambda ws: ws.run(*hf_reward(ws.root / "no-clf", harmful_labels=["hostile"])),
         ("reward.source", "{root}/no-clf", "does not exist", "fix the path")),
    Case("reward-is-seq2seq", "models", lambda ws: ws.run(*hf_reward(ws.models["t5"], harmful_labels=["hostile"])),
         ("reward.source", "T5ForConditionalGeneration", "not a sequence classifier")),
    Case("reward-no-tokenizer", "models",
         lambda ws: ws.run(*hf_reward(classifier_without_tokenizer(ws), harmful_labels=["hostile"])),
         ("reward.source", "clf-no-tokenizer", "has no tokenizer", "tokenizer.save_pretrained")),
    Case("reward-index-on-named-labels", "models",
         lambda ws: ws.run(*hf_reward(ws.classifiers["named"], harmful_index=1)),
         ("reward.harmful_index = 1", "['friendly', 'hostile']", 'reward.harmful_labels = ["hostile"]')),
    Case("reward-names-on-unnamed-model", "models",
         lambda ws: ws.run(*hf_reward(ws.classifiers["unnamed"], harmful_labels=["toxic"])),
         ("reward.harmful_labels", "'toxic'", "no label names", "reward.harmful_index")),
    Case("reward-index-out-of-range", "models", lambda ws: ws.run(*hf_reward(ws.classifiers["unnamed"], harmful_index=5)),
         ("reward.harmful_index = 5", "only 2 classes", "0 to 1")),
    Case("reward-harm-not-named", "models", lambda ws: ws.run(*hf_reward(ws.classifiers["named"])),
         ("reward", "harmful classes", "not set", "reward.harmful_labels")),
    # ------------------------------------------------------------------------------- reward
    Case("reward-label-not-found", "reward",
         lambda ws: ws.run(*hf_reward(ws.classifiers["named"], harmful_labels=["toxic"])),
         ("reward.harmful_labels", "'toxic' is not a label", "['friendly', 'hostile']")),
    Case("reward-constant-scores", "reward", lambda ws: ws.run(("reward.source", f"{M}:constant_harm")),
         ("polarity preflight: uninformative", "same harm score 0.5", "reward.source"), code=3),
    Case("reward-inverted", "reward", lambda ws: ws.run(("reward.source", f"{M}:benign_share")),
         ("polarity preflight: inverted", "1 minus what it returns now", "--force"), code=3),
    Case("reward-sign-wrong", "reward", lambda ws: ws.run(("reward.scale", -1.0)),
         ("polarity preflight: sign-wrong", "reward.scale = 1.0 instead of -1.0"), code=3),
    Case("reward-nan", "reward", lambda ws: ws.run(("reward.source", f"{M}:nan_harm")),
         ("reward.source", "nan_harm", "NaN", "expected")),
    Case("reward-percent", "reward", lambda ws: ws.run(("reward.source", f"{M}:harm_percent")),
         ("reward.source", "harm_percent", "values in [", "in [0, 1]")),
    Case("reward-wrong-length", "reward", lambda ws: ws.run(("reward.source", f"{M}:one_too_many")),
         ("reward.source", "one_too_many", "returned shape", "texts")),
    Case("reward-callable-raises", "reward", lambda ws: ws.run(("reward.source", f"{M}:raising_harm")),
         ("reward.source", "raising_harm", "RuntimeError", "the scoring service is unreachable")),
    Case("reward-module-missing", "reward", lambda ws: ws.run(("reward.source", "no_such_module_xyz:score")),
         ("reward.source = 'no_such_module_xyz:score'", "cannot import module", "PYTHONPATH")),
    Case("reward-function-missing", "reward", lambda ws: ws.run(("reward.source", f"{M}:no_such_function")),
         ("reward.source", "has no attribute 'no_such_function'", "module:function")),
    Case("reward-probe-file-missing", "reward", lambda ws: ws.run(("reward.probes", [str(ws.root / "probes.jsonl")])),
         ("reward.probes", "probes.jsonl does not exist", '"harmful": true')),
    Case("reward-probe-file-bad-row", "reward",
         lambda ws: ws.run(("reward.probes", [str(ws.file("probes.jsonl", '{"text": "hi", "harmful": "yes"}\n'))])),
         ("probes.jsonl: row 1", "'harmful' is 'yes'", "expected true or false")),
    # --------------------------------------------------------------------------- run folder
    Case("run-exists-without-resume", "run folder", lambda ws: (fake_finished_run(ws), ws.run())[1],
         ("{out}", "already holds a run (finished at step 5", "report.json", "another --out", "--overwrite"), existing_run=True),
    Case("run-exists-status-deleted", "run folder", lambda ws: (fake_finished_run(ws, status=False), ws.run())[1],
         ("{out}", "already holds a run (no status.json;", "adapter/", "another --out", "--overwrite"),
         existing_run=True),
    Case("run-exists-adapter-only", "run folder",
         lambda ws: (ws.file("run/adapter/adapter_model.safetensors", b"weights"), ws.run())[1],
         ("{out}", "already holds", "adapter/", "--overwrite"), guarded=lambda ws: ws.out),
    Case("run-exists-eval-only", "run folder",
         lambda ws: (ws.file("run/eval_before.jsonl", "{}\n"), ws.run())[1],
         ("{out}", "already holds", "eval_before.jsonl", "--overwrite"), guarded=lambda ws: ws.out),
    Case("run-interrupted-without-resume", "run folder",
         lambda ws: (fake_interrupted_run(ws), ws.run())[1],
         ("{out}", "already holds a run (interrupted at step 4", "--resume {out}", "--overwrite"),
         guarded=lambda ws: ws.out),
    Case("run-failed-preflight-rerun", "run folder", lambda ws: (failed_preflight_run(ws), ws.run(CONSTANT_REWARD))[1],
         ("{out}", "already holds a run (failed at step 0", "--resume {out}", "another --out")),
    Case("resume-failed-preflight", "run folder", lambda ws: (failed_preflight_run(ws), ws.run(CONSTANT_REWARD, extra=("--resume", str(ws.out))))[1],
         ("polarity preflight: uninformative", "reward.source"), code=3),
    Case("resume-and-overwrite", "run folder",
         lambda ws: (fake_finished_run(ws), ws.run(extra=("--resume", str(ws.out), "--overwrite")))[1],
         ("--overwrite: not allowed with argument --resume",), existing_run=True),
    Case("resume-different-seed", "run folder",
         lambda ws: (fake_finished_run(ws), ws.run(extra=("--resume", str(ws.out), "--set", "run.seed=7")))[1],
         ("--resume {out}", "run.seed: 0 in the run, 7 now", "same config"), existing_run=True),
    Case("resume-different-keys", "run folder",
         lambda ws: (fake_finished_run(ws), ws.run(extra=("--resume", str(ws.out), "--set", "kl.coef=0.3",
                                                           "--set", "evaluation.samples_per_prompt=3")))[1],
         ("2 key(s)", "kl.coef: 0.05 in the run, 0.3 now", "evaluation.samples_per_prompt: 2 in the run, 3 now"),
         existing_run=True),
    Case("resume-other-out", "run folder",
         lambda ws: (fake_finished_run(ws), ["run", str(ws.config()), "--out", str(ws.root / "elsewhere"),
                                              "--resume", str(ws.out)])[1],
         ("--out {root}/elsewhere and --resume {out} name different folders",), existing_run=True),
    Case("resume-damaged-checkpoint", "run folder",
         lambda ws: fake_interrupted_run(ws, checkpoint=b"PK\x03\x04 truncated"),
         ("{out}/checkpoint", "cannot be read", "damaged", "delete {out}/checkpoint", "--resume {out}"),
         status_after=("interrupted", 4)),
    Case("resume-damaged-checkpoint-record", "run folder",
         lambda ws: (fake_interrupted_run(ws, checkpoint=b""),
                     (ws.out / "checkpoint" / "checkpoint.json").write_text("{\"step\": "), ws.run(extra=("--resume", str(ws.out))))[2],
         ("{out}/checkpoint/checkpoint.json", "not valid JSON", "damaged"), guarded=lambda ws: ws.out),
    Case("resume-damaged-metrics", "run folder",
         lambda ws: fake_interrupted_run(ws, metrics=b'{"step": 1}\n\x00\x81garbage\n{"step": 2}\n'),
         ("{out}/metrics.jsonl", "damaged", "restore it"), status_after=("interrupted", 4)),
    Case("resume-not-a-run-folder", "run folder", lambda ws: ["run", str(ws.config()), "--resume", str(ws.root)],
         ("--resume {root}", "no config.toml there", "run folder")),
    Case("resume-different-config", "run folder",
         lambda ws: (fake_finished_run(ws), ws.run(("kl.coef", 0.3), extra=("--resume", str(ws.out))))[1],
         ("--resume {out}", "differs from the run's saved config.toml", "same config"), existing_run=True),
    Case("out-under-a-file", "run folder",
         lambda ws: ["run", str(ws.config()), "--out", str(ws.file("plain-file", "x") / "run"), "--quiet"],
         ("plain-file/run", "--out")),
    Case("out-read-only", "run folder", lambda ws: read_only_out(ws), ("{out}", "not writable", "another --out"),
         marks=(pytest.mark.skipif(os.geteuid() == 0, reason=ROOT_XFAIL),)),
    Case("disk-full-from-start", "run folder", lambda ws: (disk_full_for(ws, None), ws.run())[1],
         ("{out}", "No space left on device"), status_written=False),
    Case("disk-full-at-report", "run folder", lambda ws: (disk_full_for(ws, {"report.json"}), ws.run())[1],
         ("{out}/report.json", "No space left on device", "--resume"),
         marks=(pytest.mark.slow,)),
    Case("damaged-lock", "run folder", lambda ws: (ws.file("run/.lock", ""), ws.run())[1],
         ("{out}/.lock", "delete")),
    Case("run-subprocess-bad-data", "run folder", lambda ws: ws.data("bad.jsonl", '{"prompt": "a"}\n[1, 2]\n'),
         ("bad.jsonl", "line 2", "not a JSON object"), subprocess=True, marks=(pytest.mark.slow,)),
    Case("concurrent-second-run", "run folder",
         lambda ws: (fake_interrupted_run(ws), (ws.out / ".lock").write_text(json.dumps(
             {"pid": os.getppid(), "host": socket.gethostname(), "since": "2030-01-01T00:00:00"})), ws.run())[2],
         ("{out}", "another alignrun process is writing", f"pid {os.getppid()}", "wait for it"),
         guarded=lambda ws: ws.out, absent=("--resume", "--overwrite")),
    Case("resume-a-live-run", "run folder",
         lambda ws: (fake_interrupted_run(ws), (ws.out / ".lock").write_text(json.dumps(
             {"pid": os.getppid(), "host": socket.gethostname(), "since": "2030-01-01T00:00:00"})),
                     ws.run(extra=("--resume", str(ws.out))))[2],
         ("{out}", "another alignrun process is writing", "wait for it"), guarded=lambda ws: ws.out,
         absent=("--resume", "--overwrite")),
    # ---------------------------------------------------------------------- damaged input files
    Case("base-truncated-weights", "models",
         lambda ws: ws.run(("base.model", str(damaged_base(ws, "model.safetensors", lambda b: b[: len(b) // 2])))),
         ("base.model", "t5-damaged-model-safetensors/model.safetensors", "damaged", "save the model folder again")),
    Case("base-garbage-weights", "models",
         lambda ws: ws.run(("base.model", str(damaged_base(ws, "model.safetensors", lambda b: b"garbage" * 99)))),
         ("base.model", "model.safetensors", "cannot be read", "damaged")),
    Case("base-damaged-tokenizer", "models",
         lambda ws: ws.run(("base.model", str(damaged_base(ws, "tokenizer.json", lambda b: b[: len(b) // 3])))),
         ("base.model", "tokenizer.json", "damaged", "tokenizer.save_pretrained")),
    # ------------------------------------------------------------------ config check: files and device
    Case("config-check-missing-data", "config",
         lambda ws: ["config", "check", str(ws.config(("data.prompts", str(ws.root / "absent.jsonl"))))],
         ("[data.prompts]", "absent.jsonl", "no such file")),
    Case("config-check-missing-heldout", "config",
         lambda ws: ["config", "check", str(ws.config(("data.heldout", str(ws.root / "held.jsonl"))))],
         ("[data.heldout]", "held.jsonl", "no such file")),
    Case("config-check-missing-base", "config",
         lambda ws: ["config", "check", str(ws.config(("base.model", str(ws.root / "no-model"))))],
         ("base.model", "{root}/no-model", "does not exist")),
    Case("config-check-base-not-a-model", "config",
         lambda ws: ["config", "check", str(ws.config(("base.model", str(ws.root))))],
         ("base.model", "no config.json", "not a Hugging Face model folder")),
    Case("config-check-missing-probes", "config",
         lambda ws: ["config", "check", str(ws.config(("reward.probes", [str(ws.root / "probes.jsonl")])))],
         ("reward.probes", "probes.jsonl does not exist", '"harmful": true')),
    Case("config-check-missing-judge", "config",
         lambda ws: ["config", "check", str(ws.config(("evaluation.judge", {"backend": "hf", "source": str(ws.root / "judge")})))],
         ("evaluation.judge.source", "{root}/judge", "does not exist")),
    Case("config-check-missing-estimator", "config",
         lambda ws: ["config", "check", str(ws.config(("reward.backend", "sklearn"), ("reward.source", str(ws.root / "m.joblib"))))],
         ("reward.source", "m.joblib", "does not exist", "fitted estimator")),
    Case("config-check-cuda-without-gpu", "config",
         lambda ws: ["config", "check", str(ws.config(("base.device", "cuda")))], ("base.device = 'cuda'", "no GPU", "'cpu'"),
         marks=(pytest.mark.skipif(_has_gpu(), reason="a GPU is visible here"),)),
    Case("config-check-several-problems", "config",
         lambda ws: ["config", "check", str(ws.config(("data.prompts", str(ws.root / "a.jsonl")),
                                                      ("base.model", str(ws.root / "no-model"))))],
         ("2 problems", "a.jsonl", "no-model")),
    Case("run-data-error-before-preflight", "data",
         lambda ws: ws.data("bad.jsonl", '{"prompt": "a"}\n[1]\n', CONSTANT_REWARD),  # the preflight would fail (3)
         ("bad.jsonl", "line 2", "not a JSON object")),
    # ---------------------------------------------------------------------------------- check
    Case("check-out-finished-run", "check",
         lambda ws: (fake_finished_run(ws), ["check", str(ws.config()), "--out", str(ws.out)])[1],
         ("--out {out}", "holds a run", "report.json", "another --out"), existing_run=True),
    Case("check-out-run-without-status", "check",
         lambda ws: (fake_finished_run(ws, status=False), ["check", str(ws.config()), "--out", str(ws.out), "--overwrite"])[1],
         ("--out {out}", "holds a run", "adapter/", "kept"), existing_run=True),
    Case("check-out-earlier-check", "check",
         lambda ws: (ws.file("checks/preflight.json", "{}"), ["check", str(ws.config()), "--out", str(ws.root / "checks")])[1],
         ("preflight.json from an earlier check", "--overwrite"), guarded=lambda ws: ws.root / "checks"),
    Case("check-missing-config", "check", lambda ws: ["check", str(ws.root / "nope.toml")],
         ("nope.toml", "config file not found")),
    # --------------------------------------------------------------------------------- export
    Case("export-onto-a-file", "export",
         lambda ws: (fake_finished_run(ws), ["export", str(ws.out), "--merge", str(ws.file("model.bin", b"keep me"))])[1],
         ("--merge {root}/model.bin", "a file of that name exists"), guarded=lambda ws: ws.root / "model.bin"),
    Case("export-into-a-non-empty-folder", "export",
         lambda ws: (fake_finished_run(ws), ws.file("mine/config.json", '{"mine": true}'),
                     ["export", str(ws.out), "--merge", str(ws.root / "mine")])[2],
         ("--merge {root}/mine", "not empty", "config.json", "--overwrite"), guarded=lambda ws: ws.root / "mine"),
    Case("export-into-the-run-folder", "export",
         lambda ws: (fake_finished_run(ws), ["export", str(ws.out), "--merge", str(ws.out), "--overwrite"])[1],
         ("--merge {out}", "is the run folder"), existing_run=True),
    Case("export-inside-the-run-folder", "export",
         lambda ws: (fake_finished_run(ws), ["export", str(ws.out), "--merge", str(ws.out / "merged")])[1],
         ("--merge {out}/merged", "is the run folder"), existing_run=True),
    Case("export-around-the-run-folder", "export",
         lambda ws: (fake_finished_run(ws), ["export", str(ws.out), "--merge", str(ws.root), "--overwrite"])[1],
         ("--merge {root}", "holds the run folder"), existing_run=True),
    Case("export-onto-the-base-model", "export",
         lambda ws: (fake_run_on_own_base(ws), ["export", str(ws.out), "--merge", str(own_base(ws)), "--overwrite"])[1],
         ("--merge {root}/base-copy", "base model folder the run was trained on"), guarded=lambda ws: own_base(ws)),
    Case("export-no-adapter", "export", lambda ws: ["export", str(ws.root), "--merge", str(ws.root / "m")],
         ("{root}", "no adapter/ folder", "finished run folder")),
    # ---------------------------------------------------------------------------------- sweep
    Case("sweep-without-grid", "sweep", lambda ws: ["sweep", str(sweep_config(ws, None))],
         ("sweep.toml", "nothing to sweep", "[sweep.grid]")),
    Case("sweep-unknown-grid-key", "sweep", lambda ws: ["sweep", str(sweep_config(ws, {"kl.coeff": [0.1]}))],
         ("'kl.coeff' is not a config key",)),
    Case("sweep-into-a-run-folder", "sweep",
         lambda ws: (fake_finished_run(ws), ["sweep", str(sweep_config(ws, {"kl.coef": [0.1, 0.2]})), "--out", str(ws.out)])[1],
         ("{out}", "not a sweep folder", "another --out"), existing_run=True),
    Case("sweep-damaged-trial-report", "sweep", lambda ws: sweep_with_finished_trial(ws, '{"schema": "ali', status=True),
         ("sweep/kl.coef=0.1/report.json", "not valid JSON", "damaged"), guarded=lambda ws: ws.root / "sweep"),
    Case("sweep-finished-trial-without-status", "sweep",
         lambda ws: sweep_with_finished_trial(ws, json.dumps({"schema": "alignrun.report/1", "config": {}}), status=False),
         ("kl.coef=0.1", "already finished with a different config", "another --out"),
         guarded=lambda ws: ws.root / "sweep"),
    Case("sweep-zero-workers", "sweep", lambda ws: ["sweep", str(sweep_config(ws, {"kl.coef": [0.1]})), "--workers", "0"],
         ("--workers must be at least 1",)),
    # -------------------------------------------------------------------------------- compare
    Case("compare-missing-folder", "compare", lambda ws: ["compare", str(ws.root / "nothing")],
         ("{root}/nothing", "no such folder")),
    Case("compare-dead-run", "compare", lambda ws: ["compare", str(dead_running_run(ws))],
         ("{out}", "status: dead, step 2", "is gone", "--resume"), guarded=lambda ws: ws.out),
    Case("compare-sweep-with-dead-trial", "compare", lambda ws: ["compare", str(sweep_with_dead_trial(ws))],
         ("nothing to compare", "t1 (dead: status.json says running at step 2", "is gone"),
         guarded=lambda ws: ws.root / "sweep"),
    Case("compare-damaged-report", "compare",
         lambda ws: (fake_finished_run(ws), (ws.out / "report.json").write_bytes(b'{"schema": "alig'), ["compare", str(ws.out)])[2],
         ("{out}/report.json", "not valid JSON", "damaged"), guarded=lambda ws: ws.out),
    Case("compare-plain-folder", "compare", lambda ws: ["compare", str(ws.root)],
         ("{root}", "neither a run folder", "sweep folder")),
    # ----------------------------------------------------------------------------------- demo
    Case("demo-into-a-run-folder", "demo", lambda ws: (fake_finished_run(ws), ["demo", "--out", str(ws.out)])[1],
         ("{out}", "already holds a run (finished at step 5", "--overwrite"), existing_run=True),
    Case("demo-unknown-key", "demo", lambda ws: ["demo", "--set", "ppo.stepz=3", "--out", str(ws.out)],
         ("unknown key 'ppo.stepz'", "did you mean 'steps'")),
    # ------------------------------------------------------------------------- command line
    Case("cli-unknown-flag", "command line", lambda ws: ws.run(extra=("--frobnicate",)),
         ("unrecognized arguments: --frobnicate",)),
    Case("cli-missing-config", "command line", lambda ws: ["run"], ("the following arguments are required: config",)),
    Case("cli-no-command", "command line", lambda ws: [], ("the following arguments are required: COMMAND",)),
    Case("cli-unknown-command", "command line", lambda ws: ["trian", "x.toml"], ("invalid choice: 'trian'", "run")),
    Case("cli-export-without-merge", "command line", lambda ws: ["export", str(ws.out)],
         ("the following arguments are required: --merge",)),
    Case("cli-workers-not-int", "command line", lambda ws: ["sweep", str(ws.config()), "--workers", "two"],
         ("--workers", "invalid int value: 'two'")),
    Case("cli-set-missing-value", "command line", lambda ws: ws.run(extra=("--set",)),
         ("--set", "expected one argument")),
    Case("cli-subprocess-unknown-flag", "command line", lambda ws: ["config", "check", "x.toml", "--nope"],
         ("unrecognized arguments: --nope",), subprocess=True),
]


# the --debug row lives in test_debug_shows_traceback; it counts as one more bad input
BAD_INPUTS = len(CASES) + 1
ERROR_LINE = re.compile(r"^alignrun(?: [a-z]+)?: (?:internal )?error", re.MULTILINE)


@pytest.fixture(scope="session")
def classifiers(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Random tiny classifiers with and without label names, and a tiny decoder-only LM (wrong kinds of model)."""
    from transformers import GPT2Config, GPT2LMHeadModel

    from tests.tiny_classifiers import random_hf_classifier

    root = tmp_path_factory.mktemp("catalogue-models")
    gpt2 = root / "gpt2"
    GPT2LMHeadModel(GPT2Config(vocab_size=64, n_positions=32, n_embd=16, n_layer=1, n_head=2)).save_pretrained(gpt2)
    return {"named": random_hf_classifier(root / "named"),
            "unnamed": random_hf_classifier(root / "unnamed", labels=("LABEL_0", "LABEL_1")), "gpt2": gpt2}


@pytest.fixture
def ws(tmp_path: Path, tiny_models: dict[str, Path], classifiers: dict[str, Path],
       monkeypatch: pytest.MonkeyPatch) -> Workspace:
    monkeypatch.chdir(tmp_path)
    return Workspace(tmp_path, tiny_models, classifiers, monkeypatch)


def _invoke(case: Case, argv: list[str], ws: Workspace, capsys: pytest.CaptureFixture) -> tuple[int, str]:
    if case.subprocess:
        done = tiny_run.run_alignrun(argv, cwd=ws.root)
        return done.returncode, done.stderr
    capsys.readouterr()
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse exits on its own errors
        code = exc.code if isinstance(exc.code, int) else 1
    return code, capsys.readouterr().err


def _params() -> list[Any]:
    out = []
    for case in CASES:
        out.append(pytest.param(case, id=f"{case.group.replace(' ', '-')}:{case.id}", marks=list(case.marks)))
    return out


@pytest.mark.parametrize("case", _params())
def test_bad_input_gets_one_clear_message(case: Case, ws: Workspace, capsys: pytest.CaptureFixture) -> None:
    argv = case.argv(ws)
    before = _snapshot(ws.out) if case.existing_run else None
    guarded = case.guarded(ws) if case.guarded else None
    guarded_before = _snapshot(guarded) if guarded else None
    had_folder = ws.out.exists()
    code, err = _invoke(case, argv, ws, capsys)

    assert code == case.code, f"exit code {code}, expected {case.code}; stderr:\n{err}"
    assert "Traceback" not in err, err
    assert "internal error" not in err, f"not a user-facing message:\n{err}"
    assert len(ERROR_LINE.findall(err)) == 1, f"expected exactly one error message:\n{err}"
    for needle in case.needles:
        needle = needle.replace("{out}", str(ws.out)).replace("{root}", str(ws.root))
        assert needle in err, f"message lacks {needle!r}:\n{err}"
    for wrong in case.absent:
        assert wrong not in err, f"message gives wrong advice {wrong!r}:\n{err}"

    # nothing partial presented as complete
    if guarded is not None:
        assert _snapshot(guarded) == guarded_before, f"a refused command changed {guarded}"
    if case.status_after is not None:
        status = json.loads((ws.out / "status.json").read_text())
        assert (status["state"], status["step"]) == case.status_after, status
    elif before is not None:
        assert _snapshot(ws.out) == before, "a refused command changed an existing run folder"
    elif ws.out.is_dir() and guarded is None:
        assert not (ws.out / "report.json").exists(), "a failed run left a report.json"
        status = ws.out / "status.json"
        if status.exists() or (case.status_written and not had_folder):  # this run made the folder: say failed
            assert json.loads(status.read_text())["state"] == "failed", status.read_text()


def _snapshot(path: Path) -> dict[str, str]:
    """SHA-256 of every file under path (or of path itself), by relative name; folders listed too."""
    files = [path] if path.is_file() else sorted(path.rglob("*"))
    return {str(p.relative_to(path)) if p != path else p.name:
            hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "folder" for p in files}


def test_catalogue_size_and_coverage() -> None:
    # at least 40 bad inputs; every command (run, check, sweep, compare, export, config, demo) has its own rows
    assert BAD_INPUTS >= 40
    assert {c.group for c in CASES} == {"config", "data", "models", "reward", "run folder", "command line",
                                        "check", "export", "sweep", "compare", "demo"}
    assert len({c.id for c in CASES}) == len(CASES)


def test_debug_shows_traceback(tmp_path: Path) -> None:
    missing = tmp_path / "missing.toml"
    plain = tiny_run.run_alignrun(["config", "check", str(missing)], cwd=tmp_path)
    debug = tiny_run.run_alignrun(["--debug", "config", "check", str(missing)], cwd=tmp_path)
    assert plain.returncode == 2 and "Traceback" not in plain.stderr
    assert "config file not found" in plain.stderr
    assert debug.returncode != 0
    assert "Traceback (most recent call last)" in debug.stderr
    assert "UserError" in debug.stderr and "config file not found" in debug.stderr


@pytest.mark.slow
def test_export_writes_only_where_it_says(tmp_path: Path, tiny_models: dict[str, Path], capsys) -> None:
    """The success side of the export rows: a new folder and, with --overwrite, a non-empty one are written
    via a staging folder; "written" is printed only after the model is in place."""
    prompts = tiny_run.write_prompts(tmp_path / "prompts.jsonl")
    config = tiny_run.write_config(tmp_path / "exp.toml", tiny_run.tiny_config(tiny_models["t5"], prompts, steps=1))
    run = tmp_path / "run"
    assert main(["run", str(config), "--out", str(run), "--quiet"]) == 0
    run_before = _snapshot(run)
    capsys.readouterr()
    assert main(["export", str(run), "--merge", str(tmp_path / "merged")]) == 0
    assert f"merged model written to {tmp_path / 'merged'}" in capsys.readouterr().out
    assert (tmp_path / "merged" / "config.json").is_file() and (tmp_path / "merged" / "model.safetensors").is_file()
    (tmp_path / "old").mkdir()
    (tmp_path / "old" / "notes.txt").write_text("old")
    assert main(["export", str(run), "--merge", str(tmp_path / "old")]) == 2
    assert (tmp_path / "old" / "notes.txt").read_text() == "old"
    assert main(["export", str(run), "--merge", str(tmp_path / "old"), "--overwrite"]) == 0
    assert sorted(p.name for p in (tmp_path / "old").iterdir()) == sorted(p.name for p in (tmp_path / "merged").iterdir())
    assert not list(tmp_path.glob(".old.*")) and not list(tmp_path.glob(".merged.*"))  # no staging leftovers
    assert _snapshot(run) == run_before  # the run folder is only read
