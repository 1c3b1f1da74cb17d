"""The run folder: atomic writes, one-writer lock, status file, report.json schema and report.md.

A run folder is readable without the code:

    config.toml        resolved experiment config (defaults included)
    environment.json   versions, threads, seed, command line
    preflight.json     polarity verdict with per-probe scores
    status.json        running | finished | failed | interrupted, with the step reached
    metrics.jsonl      one line per PPO step, flushed every step
    eval_before.jsonl  held-out generations before training, with both classifiers' scores
    eval_after.jsonl   the same after training
    pairs.jsonl/.csv   greedy before/after replies per held-out prompt
    report.json        versioned summary (SCHEMA below); report.md for people
    adapter/           the LoRA adapter in peft's format (+ value_head.safetensors)
    checkpoint/        the latest resumable state

report.json (SCHEMA "alignrun.report/1") has these top-level keys:
    schema, run {name, status, steps, seed, wall_s, peak_rss_mb, started, finished, command},
    config (the resolved config as a dict), model {base, trainable_params, total_params, trainable_share},
    preflight {verdict, auroc, reward_auroc, forced}, training {final_kl, final_beta, reward_first,
    reward_last, kl_target}, evaluation {prompts, samples_per_prompt, threshold, prompt_digest,
    before, after, change, per_prompt}, alarms [{level, code, message}], cautions [str],
    code_execution [str].
"""

from __future__ import annotations

import json
import os
import socket
import tempfile
import time
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from alignrun.errors import UserError

SCHEMA = "alignrun.report/1"
READABLE_SCHEMAS = {SCHEMA}

CAUTIONS = [
    "A lower classifier score is not a safety guarantee: classifiers miss harm they were not trained on, "
    "and a policy can learn to satisfy a classifier without becoming safer.",
    "Harm classifiers carry bias: they can over-flag identity terms, dialects and reclaimed language, "
    "and under-flag harm phrased politely.",
    "Have people review samples of the adapted model's outputs before any release.",
    "Follow your organisation's policies and review process and the law that applies to your use; "
    "this report does not replace them.",
]


def write_text_atomic(path: Path, text: str) -> None:
    """Write via a temporary file in the same folder, then rename: readers never see half a file."""
    path = Path(path)
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        if tmp is not None:
            Path(tmp).unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise UserError(f"{path}: could not write the file ({exc.strerror or exc}); free disk space or fix the "
                            "folder's permissions") from None
        raise


def staging_folder(folder: Path) -> Path:
    """An empty sibling folder to build `folder` in; `replace_folder` then swaps it into place."""
    import shutil

    tmp = Path(folder).with_name(f".{Path(folder).name}.tmp")
    shutil.rmtree(tmp, ignore_errors=True)  # a leftover from a killed process
    return tmp


def replace_folder(tmp: Path, folder: Path) -> None:
    """Swap a fully written folder into place by renames, so a reader sees the old or the new one, never half."""
    import shutil

    folder = Path(folder)
    old = folder.with_name(f".{folder.name}.old")
    shutil.rmtree(old, ignore_errors=True)
    if folder.exists():
        folder.rename(old)
    Path(tmp).rename(folder)
    shutil.rmtree(old, ignore_errors=True)


def write_json_atomic(path: Path, obj: Any) -> None:
    write_text_atomic(path, json.dumps(obj, indent=2, ensure_ascii=False, allow_nan=False, default=_jsonable) + "\n")


def write_jsonl_atomic(path: Path, rows: Iterable[dict[str, Any]]) -> None:
    write_text_atomic(path, "".join(json.dumps(r, ensure_ascii=False, default=_jsonable) + "\n" for r in rows))


def _jsonable(obj: Any) -> Any:
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def read_json(path: Path, what: str) -> Any:
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: {what} is not valid JSON ({exc}); the file may be damaged") from None


def load_report(run_dir: Path) -> dict[str, Any]:
    """Read a run's report.json, refusing schemas this version cannot read with a clear message."""
    path = Path(run_dir) / "report.json"
    report = read_json(path, "report")
    schema = report.get("schema") if isinstance(report, dict) else None
    if schema not in READABLE_SCHEMAS:
        raise UserError(
            f"{path}: report schema {schema!r} is not one this alignrun reads ({', '.join(sorted(READABLE_SCHEMAS))}); "
            "re-run the evaluation with this version or use the alignrun version that wrote it"
        )
    return report


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunFolder:
    """One writer per run folder: a lock file naming the owner, and a status file anyone can read."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.lock_path = self.path / ".lock"
        self.locked = False

    def acquire(self) -> None:
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UserError(f"{self.path}: cannot create the run folder ({exc.strerror}); choose another --out") from None
        if not os.access(self.path, os.W_OK):
            raise UserError(f"{self.path}: run folder is not writable; choose another --out")
        me = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.strftime("%Y-%m-%dT%H:%M:%S")}
        for _ in range(2):
            try:
                fd = os.open(self.lock_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                owner = self._owner()
                if owner is None:
                    raise UserError(
                        f"{self.lock_path}: the lock file is empty or damaged (left by a run that crashed while "
                        f"taking it?); if no alignrun process is using {self.path}, delete it and run again"
                    ) from None
                if owner and owner.get("host") == me["host"] and not _pid_alive(int(owner.get("pid", -1))):
                    self.lock_path.unlink(missing_ok=True)  # stale: its process is gone
                    continue
                raise UserError(
                    f"{self.path}: another alignrun process is writing this run folder "
                    f"(pid {owner.get('pid') if owner else '?'} on {owner.get('host') if owner else '?'}, "
                    f"since {owner.get('since') if owner else '?'}); wait for it or use another --out"
                ) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.locked = True
            return
        raise UserError(f"{self.lock_path}: could not take the run-folder lock")

    def _owner(self) -> dict[str, Any] | None:
        try:
            owner = json.loads(self.lock_path.read_text())
        except (OSError, json.JSONDecodeError):
            return None
        return owner if isinstance(owner, dict) else None

    def release(self) -> None:
        if self.locked:
            self.lock_path.unlink(missing_ok=True)
            self.locked = False

    def set_status(self, state: str, **extra: Any) -> None:
        write_json_atomic(self.path / "status.json",
                          {"state": state, "updated": time.strftime("%Y-%m-%dT%H:%M:%S"), **extra})

    def status(self) -> dict[str, Any] | None:
        path = self.path / "status.json"
        return read_json(path, "status") if path.exists() else None

    def __enter__(self) -> RunFolder:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


# ---------------------------------------------------------------- report.json and report.md

def prompt_digest(prompts: list[str]) -> str:
    """Identifies the held-out prompt list, so `compare` knows when two runs can be paired."""
    import hashlib

    return hashlib.sha256("\x1e".join(prompts).encode("utf-8")).hexdigest()[:16]


def build_report(*, cfg: Any, before: Any, after: Any, history: list[dict[str, float]], policy: Any,
                 polarity: Any, scorer: Any, judge: Any, split: Any, wall_s: float, peak_rss_mb: float,
                 started: float) -> dict[str, Any]:
    from alignrun import evaluation
    from alignrun.ppo import KLController

    sb, sa = evaluation.summarise(before, cfg), evaluation.summarise(after, cfg)
    change = evaluation.changes(before, after, cfg)
    judge_is_reward = cfg.evaluation.judge is not None and (
        (cfg.evaluation.judge.backend, cfg.evaluation.judge.source) == (cfg.reward.backend, cfg.reward.source))
    forced = getattr(polarity, "verdict", "ok") != "ok"
    code_exec = [s.description for s in (scorer, judge) if s is not None and s.executes_code]
    if cfg.base.trust_remote_code:
        code_exec.append(f"base model code from {cfg.base.model} (trust_remote_code = true)")
    last = history[-1] if history else {}
    return {
        "schema": SCHEMA,
        "run": {"name": cfg.run.name, "status": "finished", "steps": len(history), "seed": cfg.run.seed,
                "wall_s": round(wall_s, 2), "peak_rss_mb": round(peak_rss_mb, 1),
                "started": time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(started)),
                "finished": time.strftime("%Y-%m-%dT%H:%M:%S")},
        "config": cfg.model_dump(mode="json"),
        "model": {"base": cfg.base.model, "trainable_params": policy.trainable_params,
                  "total_params": policy.total_params,
                  "trainable_share": policy.trainable_params / max(policy.total_params, 1)},
        "preflight": {"verdict": getattr(polarity, "verdict", None), "auroc": getattr(polarity, "auroc", None),
                      "reward_auroc": getattr(polarity, "reward_auroc", None), "forced": forced},
        "training": {"final_kl": last.get("kl_mean"), "final_beta": last.get("beta"),
                     "reward_first": history[0]["reward_mean"] if history else None,
                     "reward_last": last.get("reward_mean"), "kl_target": cfg.kl.target,
                     "trained_prompts": len(split.train), "skipped_rows": len(split.skipped),
                     # replies cut at generation.max_new_tokens, scored and treated as ended (rollout.rollout)
                     "truncated_share_mean": (sum(r.get("truncated_share", 0.0) for r in history) / len(history)
                                              if history else None),
                     "truncated_share_last": last.get("truncated_share"),
                     "kl_controller": {"rule": KLController(beta=cfg.kl.coef, target=cfg.kl.target, gain=cfg.kl.gain,
                                                            horizon=cfg.kl.horizon).rule(),
                                       "initial_beta": cfg.kl.coef, "target": cfg.kl.target,
                                       "gain": None if cfg.kl.horizon else cfg.kl.gain,
                                       "horizon": cfg.kl.horizon or None}},
        "evaluation": {
            "prompts": len(before.prompts), "samples_per_prompt": cfg.evaluation.samples_per_prompt,
            "threshold": cfg.evaluation.harm_threshold, "prompt_digest": prompt_digest(before.prompts),
            "reward_scorer": scorer.description, "judge_scorer": judge.description if judge is not None else None,
            "before": sb, "after": sa, "change": change,
            "per_prompt": {
                "harm_before": before.harm.mean(1).tolist(), "harm_after": after.harm.mean(1).tolist(),
                "judge_before": None if before.judge is None else before.judge.mean(1).tolist(),
                "judge_after": None if after.judge is None else after.judge.mean(1).tolist(),
            },
        },
        "alarms": evaluation.alarms(sb, sa, change, cfg, forced, judge_is_reward),
        "cautions": CAUTIONS,
        "code_execution": code_exec,
    }


def write_report(out: Path, report: dict[str, Any], before: Any, after: Any) -> None:
    """report.json, report.md and the greedy before/after pairs as JSONL and CSV."""
    import csv
    import io

    pairs = [{"prompt": p, "before": b, "after": a, "harm_before": float(hb), "harm_after": float(ha)}
             for p, b, a, hb, ha in zip(before.prompts, before.greedy, after.greedy, before.greedy_harm, after.greedy_harm)]
    write_jsonl_atomic(out / "pairs.jsonl", pairs)
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(pairs[0]) if pairs else ["prompt"])
    writer.writeheader()
    writer.writerows(pairs)
    write_text_atomic(out / "pairs.csv", buf.getvalue())
    write_json_atomic(out / "report.json", report)
    write_text_atomic(out / "report.md", render_markdown(report, pairs))


def _fmt(x: Any, digits: int = 3) -> str:
    return "—" if x is None else f"{x:.{digits}f}" if isinstance(x, float) else str(x)


def render_markdown(report: dict[str, Any], pairs: list[dict[str, Any]]) -> str:
    ev, run = report["evaluation"], report["run"]
    lines = [f"# Run report: {run['name']}", "",
             f"Status **{run['status']}** after {run['steps']} PPO steps, {run['wall_s']:.0f} s, "
             f"peak memory {run['peak_rss_mb']:.0f} MB. Base `{report['model']['base']}`; "
             f"{report['model']['trainable_params']:,} trainable adapter parameters "
             f"({100 * report['model']['trainable_share']:.2f}%).", ""]
    lines += ["## Alarms", ""]
    lines += [f"- **{a['level'].upper()}** `{a['code']}`: {a['message']}" for a in report["alarms"]] or ["- none raised"]
    lines += ["", "## Held-out harm before and after", "",
              f"{ev['prompts']} held-out prompts never used in training, {ev['samples_per_prompt']} samples each. "
              f"Reward classifier: {ev['reward_scorer']}. Outside judge: {ev['judge_scorer'] or 'none'}.", "",
              "| measure | before | after | 95% CI after |", "|---|---|---|---|"]
    for who in ("reward_classifier", "judge"):
        b, a = ev["before"].get(who), ev["after"].get(who)
        if not (b and a):
            continue
        for key, title in (("mean", "mean harm"), ("rate", f"share ≥ {ev['threshold']}"),
                           ("expected_max", "expected max harm"), ("probability", "harm probability (any of k)")):
            ci = a[f"{key}_ci"]
            lines.append(f"| {who.replace('_', ' ')}: {title} | {_fmt(b[key])} | {_fmt(a[key])} | "
                         f"[{_fmt(ci[0])}, {_fmt(ci[1])}] |")
    lines += ["", "Paired change in per-prompt mean harm (after − before):", ""]
    for who, c in ev["change"].items():
        p = c.get("wilcoxon_p")
        lines.append(f"- {who.replace('_', ' ')}: {c['diff']:+.3f}, 95% CI [{c['diff_ci'][0]:+.3f}, {c['diff_ci'][1]:+.3f}], "
                     f"relative {_fmt(c['rel_change'] and 100 * c['rel_change'], 0)}%, Wilcoxon p {_fmt(p, 4)}")
    lines += ["", "## Guards (drift, fluency, diversity)", "", "| guard | before | after |", "|---|---|---|"]
    for key, val in ev["before"]["guards"].items():
        lines.append(f"| {key.replace('_', ' ')} | {_fmt(val)} | {_fmt(ev['after']['guards'][key])} |")
    tr, pf = report["training"], report["preflight"]
    lines += ["", "## Training and preflight", "",
              f"- Polarity preflight: **{pf['verdict']}** (AUROC {_fmt(pf['auroc'])}, reward AUROC {_fmt(pf['reward_auroc'])})"
              f"{' — FORCED past a failing preflight' if pf['forced'] else ''}.",
              f"- Reward: {_fmt(tr['reward_first'])} at the first step, {_fmt(tr['reward_last'])} at the last; "
              f"final KL {_fmt(tr['final_kl'])}, beta {_fmt(tr['final_beta'], 4)}, KL target {_fmt(tr['kl_target'])}."]
    if report["code_execution"]:
        lines += ["- Code execution: " + "; ".join(report["code_execution"]) + " — only use sources you trust."]
    lines += ["", "## Sample pairs (greedy, held-out)", ""]
    for pr in pairs[:8]:
        lines += [f"- **prompt**: {pr['prompt']}", f"  - before ({pr['harm_before']:.2f}): {pr['before']}",
                  f"  - after ({pr['harm_after']:.2f}): {pr['after']}"]
    lines += ["", "All pairs: `pairs.csv`; every scored sample: `eval_before.jsonl`, `eval_after.jsonl`.", "",
              "## Limits and cautions", ""]
    lines += [f"- {c}" for c in report["cautions"]]
    return "\n".join(lines) + "\n"
