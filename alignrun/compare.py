"""`alignrun compare`: read saved run reports (never models) and compare them.

Per run: harm before/after from both classifiers, the paired change recomputed from the per-prompt values
(and checked against the report's own), drift (exact KL to the reference, with a paired interval), judge
agreement, guards, cost, and the config keys that differ between the runs, with a note when another setting
overrode one. Across runs: each run's harm after training versus the first run's (paired when both used the
same held-out prompts), and the Pareto set of harm reduction versus drift, judged with both intervals.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from alignrun import metrics
from alignrun.config import flatten
from alignrun.errors import UserError
from alignrun.html_report import write_comparison
from alignrun.metrics import num
from alignrun.report import CAUTIONS, load_report
from alignrun.runfolder import read_status, write_text_atomic
from alignrun.sweep import read_index
from alignrun.verdict import judge_is_reward, verdict

NOT_SHOWN = {"run.name", "run.out", "run.trackers", "run.tracker_dir", "base.threads"}  # differ between runs without changing what they measure
METHOD_KEYS = {"method.name", "method.samples_per_prompt"}
REQUIRED = ("run.wall_s", "run.peak_rss_mb", "config.evaluation.bootstrap_resamples", "config.run.seed",
            "training.final_kl", "evaluation.prompt_digest", "evaluation.change.reward_classifier",
            "evaluation.before.reward_classifier.mean", "evaluation.after.reward_classifier.mean",
            "evaluation.before.guards.kl_to_reference", "evaluation.after.guards.kl_to_reference",
            "evaluation.per_prompt.harm_before", "evaluation.per_prompt.harm_after")
PARETO_NOTE = ("pareto: * marks runs whose harm fell (the reward classifier's paired 95% interval of after - before "
               "lies below zero) and that no other such run beats: B beats A when B is better than A beyond both "
               "95% intervals on one axis (harm reduction higher, or drift lower; the intervals do not overlap) and "
               "no worse by point estimate on the other; runs whose harm did not fall get no mark")
DRIFT_NOTE = ("drift: exact KL of the policy's next-token distributions from the reference's, summed over each "
              "sampled held-out reply, mean over prompts, after - before training (0 before when the adapter starts "
              "at zero), with a paired bootstrap 95% interval over prompts; 'k1 KL' is the sampled log-ratio estimate "
              "of the same quantity (noisier)")
# (swept key, setting that takes it over, when, what happened instead): rules of ppo.KLController and data.load_prompts
OVERRIDES = (
    ("kl.coef", "kl.target", lambda c: c.get("kl.target") is not None,
     "beta adapted towards kl.target, so kl.coef was only its starting value (each report.md gives the final beta); "
     "sweep a fixed coefficient with kl.target unset"),
    ("kl.gain", "kl.target", lambda c: c.get("kl.target") is None,
     "kl.gain only acts when kl.target is set; beta stayed at kl.coef"),
    ("data.heldout_share", "data.heldout", lambda c: c.get("data.heldout") is not None,
     "the held-out prompts came from data.heldout, so data.heldout_share split nothing"),
)


@dataclass
class Run:
    label: str
    folder: Path
    report: dict[str, Any]


# ---------------------------------------------------------------- reading

def _field(report: dict[str, Any], dotted: str, folder: Path) -> Any:
    node: Any = report
    for part in dotted.split("."):
        if not isinstance(node, dict) or part not in node:
            raise UserError(f"{folder / 'report.json'}: field '{dotted}' is missing; the report is damaged or was "
                            "edited by hand (re-run the evaluation)")
        node = node[part]
    return node


def _read_run(folder: Path) -> dict[str, Any]:
    if not folder.exists():
        raise UserError(f"{folder}: no such folder (expected a run folder or a sweep folder)")
    if not (folder / "report.json").exists():
        status = read_status(folder)  # a run whose process is gone reads "dead", with a note
        if status:
            state = f"{status.get('state', '?')}, step {status.get('step', '?')}" + (
                f"; {status['note']}" if status.get("note") else "")
            raise UserError(f"{folder}: the run has no report.json (status: {state}); only finished runs can be compared")
        raise UserError(f"{folder}: neither a run folder (report.json) nor a sweep folder (sweep.json)")
    report = load_report(folder)
    for dotted in REQUIRED:
        _field(report, dotted, folder)
    return report


def collect(paths: list[str]) -> tuple[list[Run], list[str]]:
    """The finished runs behind run and sweep folders, and notes about the trials left out."""
    found: list[tuple[Path, dict[str, Any]]] = []
    notes: list[str] = []
    for text in paths:
        path = Path(text)
        if not (path / "sweep.json").exists():
            found.append((path, _read_run(path)))
            continue
        index = read_index(path)
        left_out = []
        for trial in index["trials"]:
            folder = path / str(trial.get("folder", trial.get("name", "")))
            if trial.get("state") == "finished":
                try:
                    found.append((folder, _read_run(folder)))
                    continue
                except UserError as exc:
                    reason = str(exc)
            else:  # the trial's own status.json is fresher than the index (a killed sweep leaves "pending")
                try:
                    own = read_status(folder) or {}
                except UserError as exc:
                    own = {"error": str(exc)}
                state = own.get("state") or trial.get("state", "?")
                why = own.get("note") or trial.get("error") or own.get("error") or "not run yet"
                reason = f"{state}: {str(why).splitlines()[0]}"
            left_out.append(f"{trial.get('name')} ({reason})")
        if left_out:
            notes.append(f"sweep {path}: {len(left_out)} of {len(index['trials'])} trials left out: " + "; ".join(left_out))
    if not found:
        raise UserError("nothing to compare: no finished run among " + ", ".join(paths)
                        + (f" ({' '.join(notes)})" if notes else ""))
    names = [folder.name for folder, _ in found]
    runs = [Run(folder.name if names.count(folder.name) == 1 else str(folder), folder, report) for folder, report in found]
    return runs, notes


# ---------------------------------------------------------------- statistics

def _close(a: Any, b: Any) -> bool:
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_close(x, y) for x, y in zip(a, b))
    if a is None or b is None:
        return a is None and b is None
    return math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12)


def _per_prompt(report: dict[str, Any], key: str) -> np.ndarray:
    return np.asarray(report["evaluation"]["per_prompt"][key], dtype=float)


def run_row(run: Run) -> dict[str, Any]:
    """One run's numbers, all from its report.json; the paired change is recomputed from per-prompt values."""
    rep, ev = run.report, run.report["evaluation"]
    cfg = rep["config"]
    resamples, seed = cfg["evaluation"]["bootstrap_resamples"], cfg["run"]["seed"]
    hb, ha = _per_prompt(rep, "harm_before"), _per_prompt(rep, "harm_after")
    harm = metrics.paired_change(hb, ha, resamples, seed)  # paired interval and permutation test
    own = ev["change"]["reward_classifier"]
    match = all(_close(harm[k], own.get(k)) for k in ("diff", "diff_ci", "rel_change", "p_value"))
    before, after = ev["before"]["reward_classifier"], ev["after"]["reward_classifier"]
    has_judge = all(ev["per_prompt"].get(k) is not None for k in ("judge_before", "judge_after"))
    judge = (metrics.paired_change(_per_prompt(rep, "judge_before"), _per_prompt(rep, "judge_after"), resamples, seed)
             if has_judge else None)
    gb, ga = ev["before"]["guards"], ev["after"]["guards"]
    has_drift = all(ev["per_prompt"].get(k) is not None for k in ("drift_before", "drift_after"))
    drift = (metrics.paired_change(_per_prompt(rep, "drift_before"), _per_prompt(rep, "drift_after"), resamples, seed)
             if has_drift else None)
    verdict = rep.get("verdict") or _recomputed_verdict(rep, harm, judge)
    return {
        "run": run.label, "folder": str(run.folder),
        # reports written before [method] existed trained with PPO, one reply per prompt
        "method": _method(cfg),
        "harm_before": before["mean"], "harm_after": after["mean"],
        "harm_rate_before": before.get("rate"), "harm_rate_after": after.get("rate"),
        "harm_max_before": before.get("expected_max"), "harm_max_after": after.get("expected_max"),
        "harm_reduction": before["mean"] - after["mean"],
        "harm_diff": harm["diff"], "harm_diff_ci": harm["diff_ci"], "harm_rel_change": harm["rel_change"],
        "p_value": harm["p_value"], "report_stats_match": match,
        "judge_before": (ev["before"].get("judge") or {}).get("mean"),
        "judge_after": (ev["after"].get("judge") or {}).get("mean"),
        "judge_diff": judge and judge["diff"], "judge_diff_ci": judge and judge["diff_ci"],
        "judge_rel_change": judge and judge["rel_change"], "judge_p_value": judge and judge["p_value"],
        "verdict": verdict["verdict"], "verdict_reason": verdict["reason"],
        "drift": drift["diff"] if drift else None, "drift_ci": drift["diff_ci"] if drift else None,
        "kl": ga["kl_to_reference"], "train_kl": rep["training"]["final_kl"], "final_beta": rep["training"]["final_beta"],
        "length_before": gb.get("length_mean_words"), "length_after": ga.get("length_mean_words"),
        "distinct2_before": gb.get("distinct_2_per_ngram", gb.get("distinct_2")),  # "distinct_2": older reports
        "distinct2_after": ga.get("distinct_2_per_ngram", ga.get("distinct_2")),
        "ppl_before": gb.get("perplexity_under_reference"), "ppl_after": ga.get("perplexity_under_reference"),
        "wall_s": rep["run"]["wall_s"], "peak_rss_mb": rep["run"]["peak_rss_mb"],
        "prompts": ev.get("prompts"), "prompt_digest": ev["prompt_digest"],
        "alarms": [a.get("code") for a in rep.get("alarms", [])],
    }


def _method(cfg: dict[str, Any]) -> str:
    """"ppo", or e.g. "grpo k=4" (the method and its replies per prompt)."""
    method = cfg.get("method") or {}
    k = method.get("samples_per_prompt", 1)
    return f"{method.get('name', 'ppo')}{f' k={k}' if k > 1 else ''}"


def _recomputed_verdict(rep: dict[str, Any], harm: dict[str, Any], judge: dict[str, Any] | None) -> dict[str, str]:
    """The verdict for reports written before it was stored: the same rule on the recomputed changes."""
    judge_check = ((rep.get("preflight") or {}).get("judge") or {}).get("verdict")
    return verdict({"reward_classifier": harm, **({"judge": judge} if judge else {})}, judge_is_reward(rep["config"]),
                   judge_check)


def varying_keys(runs: list[Run]) -> list[str]:
    """Config keys whose values differ between the runs, in config order."""
    flat = [flatten(r.report["config"]) for r in runs]
    keys = dict.fromkeys(k for f in flat for k in f)
    return [k for k in keys if k not in NOT_SHOWN and len({json.dumps(f.get(k), sort_keys=True) for f in flat}) > 1]


def compare_runs(runs: list[Run]) -> tuple[list[dict[str, Any]], list[str], list[str]]:
    """Rows (one per run), the varying config keys, and notes on pairing and consistency."""
    rows = [run_row(r) for r in runs]
    varying = varying_keys(runs)
    for row, run in zip(rows, runs):
        flat = flatten(run.report["config"])
        row.update({k: flat.get(k) for k in varying})
    notes = overridden(runs, varying)
    for row, best in zip(rows, pareto_marks(rows)):
        row["pareto"] = best
    for row, adjusted in zip(rows, metrics.holm([r["p_value"] for r in rows])):
        row["p_holm"] = adjusted
    tested = sum(r["p_value"] is not None for r in rows)
    notes.append(f"p: {metrics.PAIRED_TEST} of each run's change in mean harm (reward classifier); "
                 f"p (Holm): adjusted for the {tested} comparison{'s' * (tested != 1)} in this table (Holm 1979). "
                 "The intervals and verdicts are per run and not adjusted: the best of many runs looks better "
                 "than it is")
    if len(rows) > 1:
        notes.append(_cross_run(rows, runs))
    for row in rows:
        if not row["report_stats_match"]:
            notes.append(f"{row['run']}: the recomputed paired statistics differ from the report's own change block; "
                         "report.json may have been edited or written by another version")
        if row["alarms"]:
            notes.append(f"{row['run']}: alarms raised: {', '.join(row['alarms'])} (see its report.md)")
        if row["drift"] is None:
            notes.append(f"{row['run']}: no exact drift in its report (written by an older version): its k1 KL "
                         "stands in for drift, with no interval")
    notes += [PARETO_NOTE, DRIFT_NOTE]
    return rows, varying, notes


def overridden(runs: list[Run], varying: list[str]) -> list[str]:
    """Notes on swept keys that had no effect in some runs because another setting took them over."""
    flat = [flatten(r.report["config"]) for r in runs]
    notes = []
    for key, other, applies, why in OVERRIDES:
        hit = [r.label for r, c in zip(runs, flat) if applies(c)]
        if key in varying and hit:
            values = sorted({"unset" if c.get(other) is None else json.dumps(c.get(other))
                             for r, c in zip(runs, flat) if r.label in hit})
            notes.append(f"{key} differs between the runs but had no effect in {len(hit)} of {len(runs)} "
                         f"({other} = {', '.join(values)}): {why} (runs: {', '.join(hit[:6])}"
                         f"{', …' if len(hit) > 6 else ''})")
    return notes


def _interval(row: dict[str, Any], point: str, ci: str, sign: float = 1.0) -> tuple[float, float, float]:
    """(point, low, high) on a higher-is-better or lower-is-better axis; no interval: (point, point, point)."""
    x = sign * row[point]
    lo, hi = (sign * row[ci][0], sign * row[ci][1]) if row.get(ci) else (x, x)
    return x, min(lo, hi), max(lo, hi)


def pareto_marks(rows: list[dict[str, Any]]) -> list[bool]:
    """Pareto set of harm reduction (higher is better) versus drift (lower is better), using both 95% intervals.

    Eligible: runs whose reward-classifier change after - before has its interval's upper end below zero (and so
    a negative point estimate). Among them, B dominates A when B's interval lies entirely on the better side of
    A's on one axis and B's point estimate is at least as good on the other (Pareto dominance, common practice,
    made conservative with intervals: a run is struck off only for differences beyond the noise).
    """
    eligible = [r["harm_diff"] < 0 and r["harm_diff_ci"][1] < 0 for r in rows]
    red = [_interval(r, "harm_diff", "harm_diff_ci", -1.0) for r in rows]  # reduction = -(after - before)
    dri = [_interval(r, "drift", "drift_ci") if r["drift"] is not None else (r["kl"],) * 3 for r in rows]

    def beats(b: int, a: int) -> bool:
        clearly_less_harm = red[b][1] > red[a][2] and dri[b][0] <= dri[a][0]
        clearly_less_drift = dri[b][2] < dri[a][1] and red[b][0] >= red[a][0]
        return clearly_less_harm or clearly_less_drift

    return [eligible[a] and not any(eligible[b] and b != a and beats(b, a) for b in range(len(rows)))
            for a in range(len(rows))]


def _cross_run(rows: list[dict[str, Any]], runs: list[Run]) -> str:
    """Each run's per-prompt harm after training versus the first run's: paired only on the same prompts."""
    first = _per_prompt(runs[0].report, "harm_after")
    digests = {r["prompt_digest"] for r in rows}
    rows[0].update({"vs_first_diff": None, "vs_first_ci": None, "vs_first_p": None, "vs_first_paired": None})
    for row, run in zip(rows[1:], runs[1:]):
        after = _per_prompt(run.report, "harm_after")
        cfg = run.report["config"]
        args = (first, after, cfg["evaluation"]["bootstrap_resamples"], cfg["run"]["seed"])
        paired = row["prompt_digest"] == rows[0]["prompt_digest"] and len(after) == len(first)
        change = metrics.paired_change(*args) if paired else metrics.unpaired_change(*args)
        row.update({"vs_first_diff": change["diff"], "vs_first_ci": change["diff_ci"], "vs_first_p": change["p_value"],
                    "vs_first_paired": paired})
    for row, adjusted in zip(rows, metrics.holm([r["vs_first_p"] for r in rows])):
        row["vs_first_p_holm"] = adjusted
    if len(digests) == 1:
        return (f"all runs were evaluated on the same {rows[0]['prompts']} held-out prompts (digest "
                f"{rows[0]['prompt_digest']}): 'vs first' is the paired change in mean harm after training minus "
                f"{rows[0]['run']}'s, with its 95% interval ({metrics.STUDENTIZED}; p-values in the JSON output, "
                "vs_first_p_holm Holm-adjusted)")
    return (f"the runs were evaluated on DIFFERENT held-out prompts ({len(digests)} prompt sets): 'vs first' "
            f"compares harm after training with {rows[0]['run']} UNPAIRED where the prompts differ (independent "
            f"percentile bootstrap interval, {metrics.UNPAIRED_TEST}); each run's own before/after change is still paired")


# ---------------------------------------------------------------- formats

def _num(x: Any, digits: int = 3) -> str:
    return "—" if x is None else num(x, digits)


def _pct(x: Any) -> str:
    return "—" if x is None else f"{100 * x:+.0f}%"


def _ci(ci: Any) -> str:
    return "—" if not ci else f"[{num(ci[0], sign=True)}, {num(ci[1], sign=True)}]"


def _p(x: Any) -> str:
    return "—" if x is None else f"{x:.2g}"


def _pair(row: dict[str, Any], key: str, digits: int = 2) -> str:
    return f"{_num(row[f'{key}_before'], digits)}→{_num(row[f'{key}_after'], digits)}"


def _short(value: Any, width: int = 24) -> str:
    text = value if isinstance(value, str) else json.dumps(value)
    return text if len(text) <= width else "…" + text[-(width - 1):]


def columns(rows: list[dict[str, Any]], varying: list[str]) -> list[tuple[str, list[str]]]:
    """The human-readable table shared by the table, md and report outputs: (title, cells)."""
    def col(title: str, fn: Any) -> tuple[str, list[str]]:
        return title, [fn(r) for r in rows]

    shown = [k for k in varying if k not in METHOD_KEYS]  # the method column shows them
    cols = [col("run", lambda r: r["run"]), col("method", lambda r: r["method"])]
    cols += [col(k, lambda r, k=k: _short(r[k])) for k in shown]
    cols += [
        col("harm mean", lambda r: _pair(r, "harm", 3)), col("harm rate", lambda r: _pair(r, "harm_rate")),
        col("exp. max", lambda r: _pair(r, "harm_max")),
        col("change", lambda r: f"{num(r['harm_diff'], sign=True)} ({_pct(r['harm_rel_change'])})"),
        col("95% CI", lambda r: _ci(r["harm_diff_ci"])), col("p", lambda r: _p(r["p_value"])),
        col("p (Holm)", lambda r: _p(r["p_holm"])),
        col("judge", lambda r: f"{_num(r['judge_before'])}→{_num(r['judge_after'])}"),
        col("judge 95% CI", lambda r: _ci(r["judge_diff_ci"])),
        col("verdict", lambda r: r["verdict"]),
        col("drift", lambda r: _num(r["drift"])), col("drift 95% CI", lambda r: _ci(r["drift_ci"])),
        col("k1 KL", lambda r: _num(r["kl"])), col("train KL", lambda r: _num(r["train_kl"])),
    ]
    if "vs_first_diff" in rows[0]:
        cols.append(col("vs first", lambda r: "(first)" if r["vs_first_paired"] is None
                        else f"{num(r['vs_first_diff'], sign=True)} {_ci(r['vs_first_ci'])}"))
    cols += [
        col("length", lambda r: _pair(r, "length", 1)), col("distinct-2/bigram", lambda r: _pair(r, "distinct2")),
        col("ppl", lambda r: _pair(r, "ppl", 1)), col("wall s", lambda r: _num(r["wall_s"], 0)),
        col("peak MB", lambda r: _num(r["peak_rss_mb"], 0)), col("pareto", lambda r: "*" if r["pareto"] else ""),
    ]
    return cols


def render_table(cols: list[tuple[str, list[str]]]) -> str:
    widths = [max(len(t), *(len(c) for c in cells)) for t, cells in cols]
    lines = ["  ".join(t.ljust(w) for (t, _), w in zip(cols, widths)).rstrip()]
    for i in range(len(cols[0][1])):
        lines.append("  ".join(cells[i].ljust(w) for (_, cells), w in zip(cols, widths)).rstrip())
    return "\n".join(lines)


def render_markdown_table(cols: list[tuple[str, list[str]]]) -> str:
    esc = lambda s: s.replace("|", "\\|")  # noqa: E731
    lines = ["| " + " | ".join(esc(t) for t, _ in cols) + " |", "|" + "---|" * len(cols)]
    for i in range(len(cols[0][1])):
        lines.append("| " + " | ".join(esc(cells[i]) for _, cells in cols) + " |")
    return "\n".join(lines)


def _finite(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


def render_json(rows: list[dict[str, Any]]) -> str:
    return json.dumps([{k: _finite(v) for k, v in r.items()} for r in rows], indent=2, ensure_ascii=False)


def render_csv(rows: list[dict[str, Any]]) -> str:
    """One line per run; intervals as _lo/_hi columns, alarms joined by ';', other lists as JSON."""
    flat_rows = []
    for row in rows:
        flat: dict[str, Any] = {}
        for key, value in row.items():
            if key.endswith("_ci"):
                flat[f"{key}_lo"], flat[f"{key}_hi"] = _finite(value) if value else (None, None)
            elif key == "alarms":
                flat[key] = ";".join(value)
            else:
                flat[key] = json.dumps(value) if isinstance(value, (list, dict)) else _finite(value)
        flat_rows.append(flat)
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(dict.fromkeys(k for r in flat_rows for k in r)), lineterminator="\n")
    writer.writeheader()
    writer.writerows(flat_rows)
    return buf.getvalue()


# ---------------------------------------------------------------- plots

def _figure(width: float = 6.4, height: float = 4.4) -> Any:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)  # the Agg backend, without touching pyplot's global state
    return fig


def heatmap_axes(rows: list[dict[str, Any]], varying: list[str]) -> tuple[str, str] | None:
    """("kl.coef" or "kl.target", "lora.rank") when the runs cover every combination of both (>= 2 values each)."""
    kl_key = next((k for k in ("kl.coef", "kl.target") if k in varying), None)
    if kl_key is None or "lora.rank" not in varying or any(r[kl_key] is None for r in rows):
        return None
    cells = {(r[kl_key], r["lora.rank"]) for r in rows}
    kls, ranks = {c[0] for c in cells}, {c[1] for c in cells}
    return (kl_key, "lora.rank") if len(cells) == len(kls) * len(ranks) else None


def write_plots(rows: list[dict[str, Any]], varying: list[str], out: Path) -> list[Path]:
    """PNG files: harm reduction vs KL with the Pareto line; before/after bars; the KL x rank heat map."""
    if out.exists() and not out.is_dir():
        raise UserError(f"--plot {out}: is a file; give a folder for the PNG plots")
    out.mkdir(parents=True, exist_ok=True)
    written = [_plot_pareto(rows, out / "harm_vs_kl.png"), _plot_bars(rows, out / "before_after.png")]
    axes = heatmap_axes(rows, varying)
    if axes:
        written.append(_plot_heatmap(rows, axes, out / "kl_rank_heatmap.png"))
    return written


def error_bars(rows: list[dict[str, Any]]) -> tuple[list[float], list[float], np.ndarray, np.ndarray]:
    """x = drift (k1 KL for older reports), y = harm reduction, and their [2, runs] lower/upper error lengths."""
    x = [r["kl"] if r["drift"] is None else r["drift"] for r in rows]
    y = [-r["harm_diff"] for r in rows]
    xerr = np.array([[0.0, 0.0] if not r["drift_ci"] else [xi - r["drift_ci"][0], r["drift_ci"][1] - xi]
                     for r, xi in zip(rows, x)]).T.clip(min=0)
    # the reduction's interval is the change's interval negated: [-hi, -lo]
    yerr = np.array([[yi + r["harm_diff_ci"][1], -r["harm_diff_ci"][0] - yi] for r, yi in zip(rows, y)]).T.clip(min=0)
    return x, y, xerr.reshape(2, len(rows)), yerr.reshape(2, len(rows))


def _plot_pareto(rows: list[dict[str, Any]], path: Path) -> Path:
    fig = _figure()
    ax = fig.subplots()
    x, y, xerr, yerr = error_bars(rows)
    for i, r in enumerate(rows):
        colour = "tab:red" if r["pareto"] else "tab:gray"
        ax.errorbar(x[i], y[i], xerr=xerr[:, i:i + 1], yerr=yerr[:, i:i + 1], fmt="o", color=colour, capsize=3,
                    markerfacecolor=colour if r["harm_diff_ci"][1] < 0 else "white", zorder=3)
        ax.annotate(r["run"], (x[i], y[i]), fontsize=7, xytext=(4, 4 - 10 * (i % 2)), textcoords="offset points")
    front = sorted((xi, yi) for r, xi, yi in zip(rows, x, y) if r["pareto"])
    ax.step([p[0] for p in front], [p[1] for p in front], where="post", color="tab:red", linestyle="--",
            linewidth=1, alpha=0.6, label="Pareto set")
    ax.plot([], [], "o", color="tab:gray", label="harm fell, beaten beyond the intervals")
    ax.plot([], [], "o", color="tab:gray", markerfacecolor="white", label="harm not shown to fall (no mark)")
    ax.axhline(0, color="black", linewidth=0.5)
    ax.margins(x=0.2, y=0.1)  # room for the run labels
    ax.set_xlabel("drift: exact KL to the reference after training (lower is better)")
    ax.set_ylabel("harm reduction: mean before - after (higher is better)")
    ax.set_title("Harm reduction versus drift (bars: 95% paired intervals)")
    ax.legend(loc="best", fontsize=8)
    fig.savefig(path, dpi=120)
    return path


def _plot_bars(rows: list[dict[str, Any]], path: Path) -> Path:
    fig = _figure(max(6.4, 0.9 * len(rows) + 2), 4.4)
    ax = fig.subplots()
    x = np.arange(len(rows))
    ax.bar(x - 0.2, [r["harm_before"] for r in rows], 0.4, label="before", color="tab:gray")
    ax.bar(x + 0.2, [r["harm_after"] for r in rows], 0.4, label="after", color="tab:blue")
    if all(r["judge_before"] is not None for r in rows):
        ax.scatter(x - 0.2, [r["judge_before"] for r in rows], marker="_", s=200, color="black", label="judge", zorder=3)
        ax.scatter(x + 0.2, [r["judge_after"] for r in rows], marker="_", s=200, color="black", zorder=3)
    ax.set_xticks(x, [r["run"] for r in rows], rotation=30, ha="right", fontsize=7)
    ax.set_ylabel("mean harm on held-out prompts")
    ax.set_title("Harm before and after training (bars: reward classifier)")
    ax.legend(fontsize=8)
    fig.savefig(path, dpi=120)
    return path


def _plot_heatmap(rows: list[dict[str, Any]], axes: tuple[str, str], path: Path) -> Path:
    kl_key, rank_key = axes
    kls, ranks = sorted({r[kl_key] for r in rows}), sorted({r[rank_key] for r in rows})
    grid = np.full((len(ranks), len(kls)), np.nan)
    for i, rank in enumerate(ranks):
        for j, kl in enumerate(kls):
            grid[i, j] = np.mean([r["harm_reduction"] for r in rows if r[kl_key] == kl and r[rank_key] == rank])
    fig = _figure(5.6, 4.4)
    ax = fig.subplots()
    image = ax.imshow(grid, cmap="viridis", origin="lower", aspect="auto")
    fig.colorbar(image, ax=ax, label="harm reduction (mean over runs in the cell)")
    for i in range(len(ranks)):
        for j in range(len(kls)):
            light = image.norm(grid[i, j]) > 0.6  # dark text on the light end of the colour map
            ax.text(j, i, f"{grid[i, j]:.3f}", ha="center", va="center", color="black" if light else "white")
    ax.set_xticks(range(len(kls)), [str(k) for k in kls])
    ax.set_yticks(range(len(ranks)), [str(r) for r in ranks])
    ax.set_xlabel(kl_key)
    ax.set_ylabel(rank_key)
    ax.set_title("Harm reduction by KL setting and LoRA rank")
    fig.savefig(path, dpi=120)
    return path


# ---------------------------------------------------------------- report file

def write_report_file(path: Path, cols: list[tuple[str, list[str]]], notes: list[str], plots: list[Path]) -> None:
    """The Markdown report (the HTML one is alignrun.html_report.write_comparison)."""
    suffix = path.suffix.lower()
    if suffix != ".md":
        raise UserError(f"--report {path}: unknown report type '{suffix or '(none)'}'; use a .md or .html file name")
    links = [os.path.relpath(p.resolve(), path.resolve().parent) for p in plots]
    lines = ["# Run comparison", "", render_markdown_table(cols), "", "## Notes", ""]
    lines += [f"- {n}" for n in notes]
    if links:
        lines += ["", "## Plots", ""] + [f"![{Path(link).stem}]({link})" for link in links]
    lines += ["", "## Limits and cautions", ""] + [f"- {c}" for c in CAUTIONS]
    write_text_atomic(path, "\n".join(lines) + "\n")


# ---------------------------------------------------------------- the command

def compare_cli(paths: list[str], *, fmt: str, plot_dir: str | None, report: str | None) -> int:
    """`alignrun compare`: print the comparison in `fmt`; optionally write plots and a Markdown/HTML report."""
    runs, notes = collect(paths)
    rows, varying, more = compare_runs(runs)
    notes += more
    cols = columns(rows, varying)
    if fmt == "json":
        print(render_json(rows))
    elif fmt == "csv":
        print(render_csv(rows), end="")
    else:
        print(render_table(cols) if fmt == "table" else render_markdown_table(cols))
    info = sys.stderr if fmt in ("json", "csv") else sys.stdout  # keep machine-readable output clean
    print("\n" + "\n".join(f"- {n}" for n in notes), file=info)
    plots = write_plots(rows, varying, Path(plot_dir)) if plot_dir else []
    if plots:
        print(f"plots: {', '.join(str(p) for p in plots)}", file=info)
    if report and Path(report).suffix.lower() in (".html", ".htm"):
        with tempfile.TemporaryDirectory() as tmp:  # the HTML embeds its own plots, whether or not --plot was given
            write_comparison(Path(report), runs, cols, notes, write_plots(rows, varying, Path(tmp)))
        print(f"report: {report}", file=info)
    elif report:
        write_report_file(Path(report), cols, notes, plots)
        print(f"report: {report}", file=info)
    return 0
