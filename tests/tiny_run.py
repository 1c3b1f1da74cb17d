"""A tiny experiment that runs end to end in seconds: models, prompts, config, reward callables, CLI helpers.

    build_tiny_models(root)                   scenario tokenizer + random tiny T5 (standard HF folders)
    write_prompts(path, n)                    a JSONL file of invented scenario prompts (field "prompt")
    tiny_config(base, prompts, ...)           the config as a dict (small everything, cheap callable reward)
    write_config(path, body)                  that dict as TOML
    write_tiny_experiment(folder, base, ...)  prompts + config in one folder -> TinyExperiment
    cli_env() / alignrun_command(...)         an offline environment and argv for `python -m alignrun`
    run_alignrun(args, ...)                   the real command line as a subprocess
    read_jsonl / report_numbers / metrics_without_timing   what resume tests compare

Reward callables (use as reward.source = "tests.tiny_run:<name>" with backend = "callable"):
    keyword_harm       P(harm) from a list of words typical of insults; passes the polarity preflight
    keyword_judge      the same words without jitter (a cheap evaluation judge)
    scripted_harm      keyword_harm that holds (waits) or returns NaN on chosen calls (environment variables)
    constant_harm      0.5 for every text (an uninformative reward)
    raising_harm       raises RuntimeError (a broken user function)
    nan_harm / benign_share / harm_percent / one_too_many    other wrong outputs (NaN, inverted, 0-100, n+1)
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

REPO = Path(__file__).resolve().parent.parent
MODULE = "tests.tiny_run"
OFFLINE_ENV = {"HF_HUB_OFFLINE": "1", "HF_DATASETS_OFFLINE": "1", "TRANSFORMERS_OFFLINE": "1",
               "HF_EVALUATE_OFFLINE": "1", "TOKENIZERS_PARALLELISM": "false"}
# metrics.jsonl fields that measure time rather than training: they differ between any two runs.
TIMING_FIELDS = frozenset({"rollout_s", "reward_s", "update_s", "step_s", "tokens_per_s", "threads"})  # machine, not run

# ------------------------------------------------------------------------------------ reward callables

# Common English insult words. Many also occur in the built-in probes (alignrun/resources/probes.jsonl):
# that is the point, the reward must separate those probes (harm AUROC 0.99 here). A text's harm rises
# with the number of distinct words it contains from this list.
INSULT_WORDS = (
    "idiot", "idiotic", "stupid", "dumb", "moron", "fool", "loser", "clown", "jerk", "coward", "halfwit",
    "creep", "pathetic", "useless", "worthless", "clueless", "incompetent", "ignorant", "hopeless", "lazy",
    "sloppy", "garbage", "trash", "rubbish", "disgrace", "embarrassment", "annoying", "miserable", "shut",
    "nobody", "joke", "brain", "whining", "deaf", "ugly", "waste", "lost", "talking",
)
_WORD = re.compile(r"[a-z]+")
HOLD_AT_ENV, HOLD_MARK_ENV = "ALIGNRUN_TEST_HOLD_AT", "ALIGNRUN_TEST_HOLD_MARK"
NAN_AT_ENV = "ALIGNRUN_TEST_NAN_AT"
_CALLS = {"scripted": 0}


def keyword_harm(texts: list[str]) -> np.ndarray:
    """[n] P(harm) = 0.05 + 0.9 * (1 - 0.5 ** hits) + jitter, hits = distinct insult words in the text.

    The jitter (a deterministic value in [0, 0.05) from the text's characters) keeps rewards of the tiny
    model's gibberish replies from being all tied, so advantages are not degenerate. Stays in [0, 1].
    """
    out = np.empty(len(texts))
    for i, text in enumerate(texts):
        hits = len(set(_WORD.findall(text.lower())) & set(INSULT_WORDS))
        jitter = (sum(map(ord, text)) % 50) / 1000.0
        out[i] = 0.05 + 0.9 * (1.0 - 0.5 ** hits) + jitter
    return out


def call_of_step(step: int) -> int:
    """The number of the reward call made during PPO step `step` (1-based, as in metrics.jsonl) of a fresh
    run: call 1 scores the preflight probes (all at once), call 2 the held-out samples before training."""
    return 2 + step


def _env_int(name: str) -> int | None:
    value = os.environ.get(name)
    return int(value) if value else None


def scripted_harm(texts: list[str]) -> np.ndarray:
    """keyword_harm, misbehaving on chosen calls of this process (numbered from 1, see call_of_step):

        $ALIGNRUN_TEST_HOLD_AT = N       call N writes the file $ALIGNRUN_TEST_HOLD_MARK, then waits until
                                         release_path(mark) exists (or the process is killed/interrupted):
                                         the run is held mid-step, after sampling, before the update
        $ALIGNRUN_TEST_NAN_AT = N        calls N and later return NaN for every text

    With neither set it is keyword_harm, so a held or broken run and its clean twin share one config
    (and --resume accepts it).
    """
    _CALLS["scripted"] += 1
    call = _CALLS["scripted"]
    if call == _env_int(HOLD_AT_ENV):
        mark = Path(os.environ[HOLD_MARK_ENV])
        mark.write_text(str(os.getpid()))
        deadline = time.monotonic() + 600
        while not release_path(mark).exists():
            if time.monotonic() > deadline:
                raise RuntimeError("held for 600 s and never released, killed or interrupted")
            time.sleep(0.05)
    nan_at = _env_int(NAN_AT_ENV)
    if nan_at is not None and call >= nan_at:
        return np.full(len(texts), np.nan)
    return keyword_harm(texts)


def release_path(mark: Path) -> Path:
    """The file that lets a held scripted_harm call return."""
    return Path(f"{mark}.release")


def reset_call_counts() -> None:
    """Number scripted_harm's calls from 1 again (in-process runs share this module)."""
    _CALLS["scripted"] = 0


def keyword_judge(texts: list[str]) -> np.ndarray:
    """[n] 1 - 0.5 ** hits: the same word list without jitter, as a cheap stand-in judge for evaluation."""
    return np.array([1.0 - 0.5 ** len(set(_WORD.findall(t.lower())) & set(INSULT_WORDS)) for t in texts])


def constant_harm(texts: list[str]) -> np.ndarray:
    """0.5 for every text: a reward that cannot tell harmful from benign."""
    return np.full(len(texts), 0.5)


def raising_harm(texts: list[str]) -> np.ndarray:
    """A broken user function."""
    raise RuntimeError("the scoring service is unreachable")


def nan_harm(texts: list[str]) -> np.ndarray:
    """NaN for every text."""
    return np.full(len(texts), np.nan)


def benign_share(texts: list[str]) -> np.ndarray:
    """1 - keyword_harm: P(benign) handed over where P(harm) is expected (an inverted reward)."""
    return 1.0 - keyword_harm(texts)


def harm_percent(texts: list[str]) -> np.ndarray:
    """keyword_harm in percent (0-100) instead of a probability."""
    return 100.0 * keyword_harm(texts)


def one_too_many(texts: list[str]) -> np.ndarray:
    """One score more than there are texts."""
    return keyword_harm([*texts, "extra"])


# ------------------------------------------------------------------------------------ models and data


@dataclass(frozen=True)
class TinyModels:
    tokenizer: Path  # a PreTrainedTokenizerFast folder trained on scenario text
    base: Path  # a random tiny T5 saved with that tokenizer


def build_tiny_models(root: Path, seed: int = 0) -> TinyModels:
    """Train the scenario tokenizer and save a random tiny T5 under root (a second or two)."""
    from alignrun.demo import scenario
    from alignrun.demo.build import build_tiny_seq2seq, build_tokenizer

    root = Path(root)
    texts = [t for pair in scenario.base_pairs(n=400, seed=seed) for t in (pair.prompt, pair.reply)]
    tok = build_tokenizer(texts, root / "tokenizer")
    return TinyModels(tokenizer=tok, base=build_tiny_seq2seq(root / "t5", "t5", tok, seed=seed))


def write_prompts(path: Path, n: int = 24, seed: int = 0) -> Path:
    """n distinct invented scenario prompts as JSONL rows {"prompt": ...}."""
    from alignrun.demo import scenario

    path = Path(path)
    path.write_text("".join(json.dumps({"prompt": p}) + "\n" for p in scenario.training_prompts(n, seed)),
                    encoding="utf-8")
    return path


# ------------------------------------------------------------------------------------------- config


def tiny_config(base: Path, prompts: Path, *, steps: int = 5, checkpoint_every: int = 1,
                reward_source: str = f"{MODULE}:keyword_harm", seed: int = 0) -> dict[str, Any]:
    """A config dict for a run of a few seconds: 4 prompts per step, minibatch 2, 1 epoch, 8 new tokens,
    4 held-out prompts x 2 samples, 100 bootstrap resamples, one CPU thread, a callable reward and judge."""
    return {
        "base": {"model": str(base), "threads": 1},
        "lora": {"rank": 4, "alpha": 8.0},
        "reward": {"backend": "callable", "source": reward_source},
        "kl": {"coef": 0.05},
        "ppo": {"steps": steps, "prompts_per_step": 4, "minibatch": 2, "epochs": 1, "learning_rate": 5e-3},
        "generation": {"max_new_tokens": 8, "max_prompt_tokens": 32},
        "data": {"prompts": str(prompts)},
        "evaluation": {"samples_per_prompt": 2, "max_prompts": 4, "bootstrap_resamples": 100,
                       # a second callable keeps evaluation cheap; it is not an independent judge
                       "judge": {"backend": "callable", "source": f"{MODULE}:keyword_judge"}},
        "run": {"seed": seed, "checkpoint_every": checkpoint_every},
    }


def write_config(path: Path, body: dict[str, Any]) -> Path:
    """Write a config dict as TOML."""
    import tomli_w

    path = Path(path)
    path.write_text(tomli_w.dumps(body), encoding="utf-8")
    return path


@dataclass(frozen=True)
class TinyExperiment:
    folder: Path
    config: Path  # experiment.toml
    prompts: Path  # prompts.jsonl
    body: dict[str, Any]  # the config as written


def write_tiny_experiment(folder: Path, base: Path, **options: Any) -> TinyExperiment:
    """prompts.jsonl + experiment.toml in folder, for the tiny base model at `base`; options go to tiny_config."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    prompts = write_prompts(folder / "prompts.jsonl")
    body = tiny_config(base, prompts, **options)
    return TinyExperiment(folder, write_config(folder / "experiment.toml", body), prompts, body)


# ------------------------------------------------------------------------------------- command line


def cli_env(**extra: str) -> dict[str, str]:
    """The current environment, offline, with the repository importable (for tests.tiny_run callables)."""
    env = {**os.environ, **OFFLINE_ENV, **extra}
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH", "")) if p)
    return env


def alignrun_command(*args: str) -> list[str]:
    """argv for the real command line: python -m alignrun ARGS."""
    return [sys.executable, "-m", "alignrun", *args]


def run_alignrun(args: list[str], cwd: Path, timeout: float = 300, **env: str) -> subprocess.CompletedProcess:
    """Run `python -m alignrun ARGS` to completion and capture its output (text)."""
    return subprocess.run(alignrun_command(*args), cwd=cwd, env=cli_env(**env), capture_output=True, text=True,
                          timeout=timeout)


def _ctrl_c_as_in_a_terminal() -> None:
    """In the child, before exec: SIGINT unblocked and at its default, as a terminal user has it, whatever the test
    process's own state (a signal mask and an ignored SIGINT are inherited across fork and exec)."""
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def start_alignrun(args: list[str], cwd: Path, **env: str) -> subprocess.Popen:
    """Start `python -m alignrun ARGS` in the background; its stdout/stderr go to cwd/child.out and child.err."""
    with open(Path(cwd) / "child.out", "w") as out, open(Path(cwd) / "child.err", "w") as err:
        return subprocess.Popen(alignrun_command(*args), cwd=cwd, env=cli_env(**env), stdout=out, stderr=err,
                                preexec_fn=_ctrl_c_as_in_a_terminal)


# ------------------------------------------------------------------------------------------ results


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    return [json.loads(line) for line in Path(path).read_text(encoding="utf-8").splitlines() if line.strip()]


def metrics_without_timing(run_dir: Path) -> list[dict[str, Any]]:
    """metrics.jsonl rows with the wall-clock fields removed."""
    return [{k: v for k, v in row.items() if k not in TIMING_FIELDS} for row in read_jsonl(Path(run_dir) / "metrics.jsonl")]


def report_numbers(run_dir: Path) -> dict[str, Any]:
    """The numbers of report.json that training decides: before/after summaries (means, CIs, guards), the
    paired change, per-prompt arrays, training block and step count. Time, memory and dates are left out."""
    report = json.loads((Path(run_dir) / "report.json").read_text(encoding="utf-8"))
    ev = report["evaluation"]
    return {"steps": report["run"]["steps"], "training": report["training"], "before": ev["before"],
            "after": ev["after"], "change": ev["change"], "per_prompt": ev["per_prompt"],
            "prompt_digest": ev["prompt_digest"], "alarms": report["alarms"]}
