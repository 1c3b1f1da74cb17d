"""Bad-input catalogue: every row is one user mistake fed to the real command line.

For each row: a non-zero exit code, exactly one error message that names the culprit (file, key or row)
and the fix, no traceback unless --debug, and nothing partial presented as complete (no report.json for a
failed run; status.json says "failed" when this run created the folder; an existing run is left untouched).

Most rows call `alignrun.cli.main(argv)` in-process (the same code path as the `alignrun` script, minus
interpreter start-up); the SUBPROCESS rows and the --debug test run `python -m alignrun` for real.
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
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


def fake_finished_run(ws: Workspace) -> None:
    ws.out.mkdir()
    (ws.out / "status.json").write_text(json.dumps({"state": "finished", "step": 5}))
    (ws.out / "report.json").write_text(json.dumps({"schema": "alignrun.report/1", "marker": "kept"}))
    (ws.out / "config.toml").write_text(ws.config().read_text())


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
    Case("base-is-decoder-only", "models", lambda ws: ws.run(("base.model", str(ws.classifiers["gpt2"]))),
         ("base.model", "'gpt2' model, not an encoder-decoder")),
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
         ("{out}", "already holds a run", "--resume {out}", "another --out"), existing_run=True),
    Case("run-failed-preflight-rerun", "run folder", lambda ws: (failed_preflight_run(ws), ws.run(CONSTANT_REWARD))[1],
         ("{out}", "already holds a run", "another --out")),
    Case("resume-failed-preflight", "run folder", lambda ws: (failed_preflight_run(ws), ws.run(CONSTANT_REWARD, extra=("--resume", str(ws.out))))[1],
         ("{out}", "nothing to resume", "another --out")),
    Case("resume-not-a-run-folder", "run folder", lambda ws: ws.run(extra=("--resume", str(ws.root))),
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
    had_folder = ws.out.exists()
    code, err = _invoke(case, argv, ws, capsys)

    assert code == case.code, f"exit code {code}, expected {case.code}; stderr:\n{err}"
    assert "Traceback" not in err, err
    assert "internal error" not in err, f"not a user-facing message:\n{err}"
    assert len(ERROR_LINE.findall(err)) == 1, f"expected exactly one error message:\n{err}"
    for needle in case.needles:
        needle = needle.replace("{out}", str(ws.out)).replace("{root}", str(ws.root))
        assert needle in err, f"message lacks {needle!r}:\n{err}"

    # nothing partial presented as complete
    if before is not None:
        assert _snapshot(ws.out) == before, "a refused command changed an existing run folder"
    elif ws.out.is_dir():
        assert not (ws.out / "report.json").exists(), "a failed run left a report.json"
        status = ws.out / "status.json"
        if status.exists() or (case.status_written and not had_folder):  # this run made the folder: say failed
            assert json.loads(status.read_text())["state"] == "failed", status.read_text()


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


def test_catalogue_size_and_coverage() -> None:
    # the issue asks for at least 40 bad inputs across these six groups
    assert BAD_INPUTS >= 40
    assert {c.group for c in CASES} == {"config", "data", "models", "reward", "run folder", "command line"}
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
