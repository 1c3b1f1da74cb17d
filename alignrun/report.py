"""The report: report.json schema, build_report, report.md, and reading reports back (run-folder I/O: runfolder).

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

report.json (SCHEMA "alignrun.report/2") has these top-level keys:
    schema, run {name, status, steps, seed, wall_s, peak_rss_mb, started, finished, command},
    config (the resolved config as a dict), model {base, trainable_params, total_params, trainable_share},
    preflight {verdict, auroc, reward_auroc, forced}, training {final_kl, final_beta, reward_first,
    reward_last, kl_target, method {name, samples_per_prompt, advantage, group_std, loss_average, kl_placement
    ("reward" or "loss"), kl_term, beta_scales, value_head}; absent in older reports = PPO}, data {heldout_overlap {shared, of, share} or null, warnings, prompts, heldout},
    evaluation {prompts, samples_per_prompt, threshold, prompt_digest, before, after, change,
    drift (exact-KL change, paired interval; absent in older reports), per_prompt},
    verdict {verdict, level, reason}, alarms [{level, code, message}], cautions [str], code_execution [str].
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from alignrun.errors import UserError
from alignrun.metrics import num
from alignrun.runfolder import read_json, write_json_atomic, write_jsonl_atomic, write_text_atomic
from alignrun.verdict import ci_text, preflight_forced

# /2: paired changes carry p_value/test/interval (permutation test, bootstrap-t) instead of wilcoxon_p/rel_ci,
# distinct-2 is split by its denominator, verdict/drift/data blocks were added. compare reads /1 reports too
# (it recomputes their statistics from per_prompt).
SCHEMA = "alignrun.report/2"
READABLE_SCHEMAS = {"alignrun.report/1", SCHEMA}

CAUTIONS = [
    "A lower classifier score is not a safety guarantee: classifiers miss harm they were not trained on, "
    "and a policy can learn to satisfy a classifier without becoming safer.",
    "Harm classifiers carry bias: they can over-flag identity terms, dialects and reclaimed language, "
    "and under-flag harm phrased politely.",
    "Have people review samples of the adapted model's outputs before any release.",
    "Follow your organisation's policies and review process and the law that applies to your use; "
    "this report does not replace them.",
]


def load_report(run_dir: Path) -> dict[str, Any]:
    """Read a run's report.json, refusing schemas this version cannot read with a clear message."""
    path = Path(run_dir) / "report.json"
    report = read_json(path, "report", f"delete it and write it again with: alignrun run CONFIG --resume {run_dir} "
                       "(training is not repeated)")
    schema = report.get("schema") if isinstance(report, dict) else None
    if schema not in READABLE_SCHEMAS:
        raise UserError(
            f"{path}: report schema {schema!r} is not one this alignrun reads ({', '.join(sorted(READABLE_SCHEMAS))}); "
            "re-run the evaluation with this version or use the alignrun version that wrote it"
        )
    return report


# ---------------------------------------------------------------- report.json and report.md

def prompt_digest(prompts: list[str]) -> str:
    """Identifies the held-out prompt list, so `compare` knows when two runs can be paired."""
    import hashlib

    return hashlib.sha256("\x1e".join(prompts).encode("utf-8")).hexdigest()[:16]


def build_report(*, cfg: Any, before: Any, after: Any, assessment: dict[str, Any], history: list[dict[str, float]],
                 policy: Any, polarity: Any, scorer: Any, judge: Any, split: Any, wall_s: float, peak_rss_mb: float,
                 started: float, judge_polarity: Any = None) -> dict[str, Any]:
    """Assemble report.json from what the run computed: `assessment` is evaluation.assess's summaries, changes,
    drift, verdict and alarms; judge_polarity the judge's own preflight result (with .verdict), or None."""
    from alignrun import advantages
    from alignrun.ppo import KLController

    forced = preflight_forced(polarity, judge_polarity)
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
                      "reward_auroc": getattr(polarity, "reward_auroc", None), "forced": forced,
                      "warnings": list(getattr(polarity, "warnings", [])),
                      "judge": None if judge_polarity is None else {
                          "verdict": judge_polarity.verdict, "auroc": judge_polarity.auroc,
                          "auroc_interval": list(judge_polarity.auroc_interval), "gap": judge_polarity.gap,
                          "forced": judge_polarity.forced, "warnings": list(judge_polarity.warnings)}},
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
                                       "horizon": cfg.kl.horizon or None},
                     "method": advantages.describe(cfg.method, cfg.ppo)},
        "data": {key: getattr(split, "source", {}).get(key) for key in ("heldout_overlap", "warnings", "prompts", "heldout")},
        "evaluation": {
            "prompts": len(before.prompts), "samples_per_prompt": cfg.evaluation.samples_per_prompt,
            "threshold": cfg.evaluation.harm_threshold, "prompt_digest": prompt_digest(before.prompts),
            "reward_scorer": scorer.description, "judge_scorer": judge.description if judge is not None else None,
            **{key: assessment[key] for key in ("before", "after", "change", "drift")},
            "per_prompt": {
                "harm_before": before.harm.mean(1).tolist(), "harm_after": after.harm.mean(1).tolist(),
                "judge_before": None if before.judge is None else before.judge.mean(1).tolist(),
                "judge_after": None if after.judge is None else after.judge.mean(1).tolist(),
                "drift_before": None if before.kl_exact is None else before.kl_exact.mean(1).tolist(),
                "drift_after": None if after.kl_exact is None else after.kl_exact.mean(1).tolist(),
            },
        },
        "verdict": assessment["verdict"],
        "alarms": assessment["alarms"],
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


GUARD_LABELS = {  # how reports name each guard; the denominators are part of the name
    "perplexity_under_reference": "perplexity under the reference",
    "kl_to_reference": "KL to the reference, k1 (nats per reply)",
    "kl_exact_to_reference": "KL to the reference, exact per position (nats per reply)",
    "length_mean_words": "length, mean words",
    "length_median_words": "length, median words",
    "distinct_1": "distinct-1, distinct words / words",
    "distinct_2_per_ngram": "distinct-2, distinct bigrams / bigrams",
    "distinct_2_per_token": "distinct-2 (Li et al. 2016), distinct bigrams / words",
    "empty_share": "empty replies, share",
    "repeated_share": "replies identical to another, share",
    "seq_rep_4_mean": "seq-rep-4 (Welleck et al. 2019), mean",
    "seq_rep_4_share": "replies with seq-rep-4 above the threshold, share",
    "truncated_share": "replies cut off at the token limit, share",
}


def _fmt(x: Any, digits: int = 3) -> str:
    return "—" if x is None else num(x, digits) if isinstance(x, float) else str(x)


def render_markdown(report: dict[str, Any], pairs: list[dict[str, Any]]) -> str:
    ev, run, v = report["evaluation"], report["run"], report["verdict"]
    lines = [f"# Run report: {run['name']}", "",
             f"Status **{run['status']}** after {run['steps']} PPO steps, {run['wall_s']:.0f} s, "
             f"peak memory {run['peak_rss_mb']:.0f} MB. Base `{report['model']['base']}`; "
             f"{report['model']['trainable_params']:,} trainable adapter parameters "
             f"({100 * report['model']['trainable_share']:.2f}%).", ""]
    lines += ["## Verdict", "", f"**{v['verdict'].upper()}**: {v['reason']}.", "",
              "*Improved* only when the 95% intervals of the paired change in mean harm lie below zero for both the "
              "reward classifier and the outside judge; *worse* when either lies above zero; otherwise not shown. "
              "A verdict is about these two classifiers on these prompts, not a safety finding.", ""]
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
    lines += ["", "Paired change in per-prompt mean harm (after − before); the interval and the p-value concern the "
              "same quantity, the mean difference:", ""]
    for who, c in ev["change"].items():
        lines.append(f"- {who.replace('_', ' ')}: {num(c['diff'], sign=True)}, 95% interval "
                     f"[{num(c['diff_ci'][0], sign=True)}, {num(c['diff_ci'][1], sign=True)}] ({c['interval']}), "
                     f"relative {_fmt(c['rel_change'] and 100 * c['rel_change'], 0)}%, p {_fmt(c['p_value'], 4)} "
                     f"({c['test']})")
    d = ev.get("drift")
    if d:
        lines += ["", f"Drift from the reference (exact KL of the next-token distributions summed over each reply, "
                  f"mean over prompts): {num(d['mean_before'])} before, {num(d['mean_after'])} after; change "
                  f"{num(d['diff'], sign=True)}, 95% paired interval [{num(d['diff_ci'][0], sign=True)}, "
                  f"{num(d['diff_ci'][1], sign=True)}] ({d['interval']})."]
    cfg_ev = report["config"]["evaluation"]
    lines += ["", "## Guards (drift, fluency, diversity, degeneration)", "",
              f"A reply loops when its seq-rep-4 is above {cfg_ev['repetition_threshold']}; it is cut off when it "
              "reaches the token limit without an end-of-sequence token. Words are whitespace tokens.", "",
              "| guard | before | after |", "|---|---|---|"]
    for key, val in ev["before"]["guards"].items():
        lines.append(f"| {GUARD_LABELS.get(key, key.replace('_', ' '))} | {_fmt(val)} | {_fmt(ev['after']['guards'][key])} |")
    tr, pf = report["training"], report["preflight"]
    lines += ["", "## Training and preflight", "",
              f"- Polarity preflight: **{pf['verdict']}** (AUROC {_fmt(pf['auroc'])}, reward AUROC {_fmt(pf['reward_auroc'])})"
              f"{' — FORCED past a failing preflight' if pf['forced'] else ''}.",
              f"- Reward: {_fmt(tr['reward_first'])} at the first step, {_fmt(tr['reward_last'])} at the last; "
              f"final KL {_fmt(tr['final_kl'])}, beta {_fmt(tr['final_beta'], 4)}, KL target {_fmt(tr['kl_target'])}."]
    if tr.get("method"):
        m = tr["method"]
        lines += [f"- Method: **{m['name']}**, {m['samples_per_prompt']} replies per prompt; advantage: {m['advantage']}; "
                  f"KL: {m['kl_term']} (beta scales {m['beta_scales']}); losses averaged over {m['loss_average']}."]
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


def summary_text(report: dict[str, Any]) -> str:
    """The command-line verdict and before/after table, verdict and alarms first."""
    ev, v = report["evaluation"], report["verdict"]
    lines = [f"{'!!! ' if v['level'] == 'critical' else ''}VERDICT: {v['verdict'].upper()} - {v['reason']}"]
    for a in report["alarms"]:
        lines.append(f"{'!!! ' if a['level'] == 'critical' else '!  '}{a['level'].upper()} {a['code']}: {a['message']}")
    lines.append(f"\nheld-out prompts: {ev['prompts']}, samples per prompt: {ev['samples_per_prompt']}")
    lines.append(f"{'':28}{'before':>10}{'after':>10}{'change':>10}")
    rows = [("harm mean (reward clf)", "reward_classifier", "mean"),
            (f"harm rate >= {ev['threshold']}", "reward_classifier", "rate"),
            ("expected max harm", "reward_classifier", "expected_max"),
            ("judge mean (outside)", "judge", "mean"), ("judge expected max", "judge", "expected_max")]
    for title, who, key in rows:
        b, a = ev["before"].get(who), ev["after"].get(who)
        if b and a:
            rel = f"{100 * (a[key] - b[key]) / b[key]:+.0f}%" if b[key] else "n/a"
            lines.append(f"{title:28}{num(b[key]):>10}{num(a[key]):>10}{rel:>10}")
    for title, key in (("drift (exact KL)", "kl_exact_to_reference"), ("KL to reference (k1)", "kl_to_reference"),
                       ("length (words)", "length_mean_words"),
                       ("distinct-2 (per bigram)", "distinct_2_per_ngram"), ("seq-rep-4 mean", "seq_rep_4_mean"),
                       ("looping share", "seq_rep_4_share"), ("cut-off share", "truncated_share"),
                       ("perplexity (reference)", "perplexity_under_reference")):
        b, a = ev["before"]["guards"].get(key), ev["after"]["guards"].get(key)
        if b is not None and a is not None:
            lines.append(f"{title:28}{num(b):>10}{num(a):>10}")
    for who, c in ev["change"].items():
        p = "n/a" if c["p_value"] is None else f"{c['p_value']:.2g}"
        lines.append(f"{who.replace('_', ' ')}: mean harm change {num(c['diff'], sign=True)}, 95% interval {ci_text(c)} "
                     f"({c['interval']}); p = {p} ({c['test']})")
    return "\n".join(lines)
