"""`alignrun compare` on synthetic run folders: no models, only report.json files.

The reports are made by the real `alignrun.report.build_report` from evaluation results whose per-prompt
scores come from seeded numpy generators, so they have exactly the shape a run writes.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from alignrun import compare, metrics
from alignrun.cli import main
from alignrun.config import Experiment, with_overrides
from alignrun.errors import UserError
from alignrun.report import build_report
from alignrun.runfolder import RunFolder, write_json_atomic

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (RFC 2083), section 3.1
WORDS = "thanks order bike repair today tomorrow shop parts wheel chain ugh seriously".split()
BASE = Experiment.model_validate({
    "base": {"model": "tiny-base"}, "reward": {"source": "tiny-classifier", "harmful_labels": ["rude"]},
    "data": {"prompts": "prompts.jsonl"}, "run": {"name": "synthetic"},
    "evaluation": {"bootstrap_resamples": 200, "samples_per_prompt": 3},
})


def _eval_result(prompts: list[str], harm: np.ndarray, judge: np.ndarray | None, kl: np.ndarray,
                 rng: np.random.Generator) -> SimpleNamespace:
    from alignrun.evaluation import EvalResult

    n, k = harm.shape
    samples = [[" ".join(rng.choice(WORDS, size=rng.integers(3, 9))) for _ in range(k)] for _ in range(n)]
    token_ids = [[[WORDS.index(w) + 5 for w in s.split()] + [1] for s in row] for row in samples]  # 1 = EOS
    tokens = np.array([[len(ids) for ids in row] for row in token_ids], dtype=float)
    ref_nll = tokens * rng.uniform(1.0, 3.0, size=(n, k))
    return EvalResult(prompts=prompts, samples=samples, token_ids=token_ids, harm=harm, judge=judge,
                      logp=kl - ref_nll, kl=kl, ref_nll=ref_nll, tokens=tokens,
                      greedy=[row[0] for row in samples], greedy_harm=harm[:, 0],
                      greedy_judge=None if judge is None else judge[:, 0])


def make_run(folder: Path, *, effect: float, drift: float, overrides: dict | None = None, prompt_set: int = 0,
             with_judge: bool = True, judge_effect: float | None = None, n: int = 24,
             judge_polarity: SimpleNamespace | None = None) -> dict:
    """A finished run folder whose harm falls by about `effect` (a share) at KL about `drift`."""
    cfg = with_overrides(BASE, {"run.name": folder.name, **(overrides or {})})
    k = cfg.evaluation.samples_per_prompt
    prompts = [f"set {prompt_set} prompt {i}: where is my bike?" for i in range(n)]
    base_rng = np.random.default_rng([prompt_set])  # same prompt set -> same scores before training
    harm_before = base_rng.beta(2, 3, size=(n, k))
    judge_before = np.clip(0.8 * harm_before + base_rng.normal(0, 0.05, size=(n, k)), 0, 1)
    rng = np.random.default_rng([prompt_set, cfg.run.seed, int(1000 * effect), int(1000 * drift)])
    harm_after = np.clip(harm_before * (1 - effect) + rng.normal(0, 0.02, size=(n, k)), 0, 1)
    je = effect if judge_effect is None else judge_effect
    judge_after = np.clip(judge_before * (1 - je) + rng.normal(0, 0.02, size=(n, k)), 0, 1)
    before = _eval_result(prompts, harm_before, judge_before if with_judge else None,
                          rng.normal(0, 0.01, size=(n, k)), rng)
    after = _eval_result(prompts, harm_after, judge_after if with_judge else None,
                         drift + rng.normal(0, 0.01, size=(n, k)), rng)
    history = [{"reward_mean": -0.4 + 0.01 * s, "kl_mean": drift * s / 4, "beta": cfg.kl.coef} for s in range(1, 5)]
    tool = SimpleNamespace(description="synthetic scorer", executes_code=False)
    from alignrun.evaluation import assess

    polarity = SimpleNamespace(verdict="ok", auroc=0.95, reward_auroc=0.95)
    report = build_report(
        cfg=cfg, before=before, after=after, history=history,
        assessment=assess(before, after, cfg, 1, polarity, judge_polarity),
        policy=SimpleNamespace(trainable_params=1000 * cfg.lora.rank, total_params=1_000_000,
                               tokenizer=SimpleNamespace(eos_token_id=1)),
        polarity=polarity, scorer=tool,
        judge=tool if with_judge else None, split=SimpleNamespace(train=prompts, skipped=[]),
        wall_s=float(rng.uniform(30, 90)), peak_rss_mb=float(rng.uniform(400, 900)), started=0.0,
        judge_polarity=judge_polarity)
    write_json_atomic(folder / "report.json", report)
    RunFolder(folder).set_status("finished", step=4)
    return report


def run_compare(capsys: pytest.CaptureFixture, paths: list[Path], fmt: str = "table", **kw) -> tuple[str, str]:
    assert compare.compare_cli([str(p) for p in paths], fmt=fmt, plot_dir=kw.get("plot_dir"),
                               report=kw.get("report")) == 0
    captured = capsys.readouterr()
    return captured.out, captured.err


def as_json(capsys: pytest.CaptureFixture, paths: list[Path]) -> list[dict]:
    return json.loads(run_compare(capsys, paths, "json")[0])


def test_statistics_match_scipy(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    report = make_run(tmp_path / "a", effect=0.3, drift=0.2, overrides={"run.seed": 5})
    [row] = as_json(capsys, [tmp_path / "a"])
    per = report["evaluation"]["per_prompt"]
    before, after = np.array(per["harm_before"]), np.array(per["harm_after"])
    # paired sign-flip permutation test of the mean difference, reference scipy.stats.permutation_test, with the
    # run's seed and resamples
    ref_p = stats.permutation_test((after - before,), np.mean, permutation_type="samples", vectorized=True,
                                   n_resamples=200, rng=np.random.default_rng(5)).pvalue
    assert row["p_value"] == pytest.approx(ref_p, rel=1e-12)
    assert row["harm_diff_ci"] == list(metrics.mean_diff_ci(after - before, 200, 5)[0])
    assert row["harm_rel_change"] == pytest.approx(after.mean() / before.mean() - 1, rel=1e-12)
    assert row["harm_reduction"] == pytest.approx(before.mean() - after.mean(), rel=1e-9)
    jb, ja = np.array(per["judge_before"]), np.array(per["judge_after"])
    ref_p = stats.permutation_test((ja - jb,), np.mean, permutation_type="samples", vectorized=True,
                                   n_resamples=200, rng=np.random.default_rng(5)).pvalue
    assert row["judge_p_value"] == pytest.approx(ref_p, rel=1e-12)
    assert row["verdict"] == report["verdict"]["verdict"] == "improved"
    # the report's own change block was computed the same way: the cross-check passes
    assert row["report_stats_match"] is True
    assert row["kl"] == report["evaluation"]["after"]["guards"]["kl_to_reference"]


def test_edited_change_block_is_noted(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    report = make_run(tmp_path / "a", effect=0.3, drift=0.2)
    report["evaluation"]["change"]["reward_classifier"]["p_value"] = 0.5
    write_json_atomic(tmp_path / "a" / "report.json", report)
    out, _ = run_compare(capsys, [tmp_path / "a"])
    assert "differ from the report's own change block" in out


def test_judge_disagreement_is_shown(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    make_run(tmp_path / "hacked", effect=0.4, drift=0.2, judge_effect=-0.3)  # judge harm rises
    [row] = as_json(capsys, [tmp_path / "hacked"])
    assert row["verdict"] == "worse" and row["judge_diff_ci"][0] > 0
    # the case: reward -30%, judge -0.7%: the report warned, compare said "agrees: yes"; now one rule
    report = make_run(tmp_path / "unconfirmed", effect=0.3, drift=0.2, judge_effect=0.007)
    [row] = as_json(capsys, [tmp_path / "unconfirmed"])
    assert row["verdict"] == report["verdict"]["verdict"] == "not shown"
    assert "reward-judge-disagree" in row["alarms"]
    make_run(tmp_path / "nojudge", effect=0.4, drift=0.2, with_judge=False)
    [row] = as_json(capsys, [tmp_path / "nojudge"])
    assert row["judge_before"] is None and row["verdict"] == "not shown" and "no outside judge" in row["verdict_reason"]


def test_one_verdict_everywhere(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # computed once in build_report; the CLI summary, report.md and compare show that same verdict
    from alignrun.report import render_markdown, summary_text

    for name, judge_effect, expected in (("good", None, "improved"), ("worse", -0.3, "worse"),
                                         ("open", 0.007, "not shown")):
        report = make_run(tmp_path / name, effect=0.3, drift=0.2, judge_effect=judge_effect)
        v = report["verdict"]
        assert v["verdict"] == expected
        assert summary_text(report).splitlines()[0].endswith(f"VERDICT: {expected.upper()} - {v['reason']}")
        markdown = render_markdown(report, [])
        assert f"**{expected.upper()}**: {v['reason']}." in markdown
        # distinct-2 is named by its denominator both ways; the degeneration guards are shown before and after
        for label in ("distinct-2, distinct bigrams / bigrams", "distinct-2 (Li et al. 2016), distinct bigrams / words",
                      "seq-rep-4 (Welleck et al. 2019), mean", "replies cut off at the token limit, share"):
            assert f"| {label} |" in markdown
        [row] = as_json(capsys, [tmp_path / name])
        assert (row["verdict"], row["verdict_reason"]) == (expected, v["reason"])
        table, _ = run_compare(capsys, [tmp_path / name])
        assert expected in table.splitlines()[1]


def _judge_check(verdict: str) -> SimpleNamespace:
    """The judge's preflight result as build_report reads it (preflight.PolarityReport's fields)."""
    return SimpleNamespace(verdict=verdict, auroc=0.9, auroc_interval=(0.85, 0.95), gap=0.5, forced=False, warnings=[])


def test_the_judges_own_check_reaches_verdict_and_alarms(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # build_report(judge_polarity=...) as the preflight passes it: a judge that failed its polarity check
    # cannot confirm a gain, and a disagreement names it as a suspect
    report = make_run(tmp_path / "bad", effect=0.3, drift=0.2, judge_polarity=_judge_check("inverted"))
    assert report["verdict"]["verdict"] == "not shown" and "inverted" in report["verdict"]["reason"]
    report = make_run(tmp_path / "good", effect=0.3, drift=0.2, judge_polarity=_judge_check("ok"))
    assert report["verdict"]["verdict"] == "improved"
    report = make_run(tmp_path / "weak", effect=0.3, drift=0.2, judge_effect=0.007,
                      judge_polarity=_judge_check("weak"))
    [message] = [a["message"] for a in report["alarms"] if a["code"] == "reward-judge-disagree"]
    assert "faulty judge (its polarity check: weak)" in message


def test_compare_reads_the_stored_verdict_and_recomputes_it_for_older_reports(tmp_path: Path,
                                                                             capsys: pytest.CaptureFixture) -> None:
    from alignrun.verdict import verdict

    report = make_run(tmp_path / "a", effect=0.3, drift=0.2)
    report["verdict"] = {"verdict": "not shown", "level": "info", "reason": "stored reason"}
    write_json_atomic(tmp_path / "a" / "report.json", report)
    [row] = as_json(capsys, [tmp_path / "a"])
    assert (row["verdict"], row["verdict_reason"]) == ("not shown", "stored reason")  # read, not recomputed
    # a report of schema /1, written before the verdict, drift and permutation p-values were stored
    del report["verdict"], report["evaluation"]["drift"]
    report["schema"] = "alignrun.report/1"
    for block in report["evaluation"]["change"].values():
        block["wilcoxon_p"] = block.pop("p_value")
        del block["test"], block["interval"]
    for when in ("before", "after"):
        guards = report["evaluation"][when]["guards"]
        guards["distinct_2"] = guards.pop("distinct_2_per_ngram")
        del guards["distinct_2_per_token"], guards["kl_exact_to_reference"]
    write_json_atomic(tmp_path / "a" / "report.json", report)
    [row] = as_json(capsys, [tmp_path / "a"])
    per, cfg = report["evaluation"]["per_prompt"], BASE.evaluation
    change = {who: metrics.paired_change(np.array(per[f"{key}_before"]), np.array(per[f"{key}_after"]),
                                         cfg.bootstrap_resamples, 0) for who, key in (("reward_classifier", "harm"),
                                                                                      ("judge", "judge"))}
    assert row["verdict"] == verdict(change)["verdict"] == "improved"
    assert row["verdict_reason"] == verdict(change)["reason"]


def test_holm_adjusted_p_values_across_rows(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    from statsmodels.stats.multitest import multipletests

    folders = _grid(tmp_path)
    make_run(tmp_path / "null", effect=0.0, drift=0.1)  # no effect: a large p-value
    folders.append(tmp_path / "null")
    rows = as_json(capsys, folders)
    raw = [r["p_value"] for r in rows]
    # Holm 1979, reference statsmodels.stats.multitest.multipletests(method="holm")
    assert [r["p_holm"] for r in rows] == pytest.approx(multipletests(raw, method="holm")[1].tolist(), rel=1e-12)
    out, _ = run_compare(capsys, folders)
    assert "adjusted for the 5 comparisons in this table (Holm 1979)" in out
    assert "p (Holm)" in out.splitlines()[0]


def test_pareto_set_hand_made(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # Same prompts, so harm reduction grows with `effect`. By hand (Pareto dominance: more reduction and
    # less KL): c (0.2, KL 0.3) is beaten by a (0.5, KL 0.2); a, b (least KL) and d (most reduction) are not.
    points = {"a": (0.5, 0.2), "b": (0.3, 0.1), "c": (0.2, 0.3), "d": (0.6, 0.9)}
    for name, (effect, drift) in points.items():
        make_run(tmp_path / name, effect=effect, drift=drift)
    rows = as_json(capsys, [tmp_path / name for name in points])
    assert {r["run"]: r["pareto"] for r in rows} == {"a": True, "b": True, "c": False, "d": True}
    table, _ = run_compare(capsys, [tmp_path / name for name in points])
    marked = {line.split()[0] for line in table.splitlines()[1:5] if line.rstrip().endswith("*")}
    assert marked == {"a", "b", "d"}


def _grid(tmp_path: Path) -> list[Path]:
    folders = []
    for i, coef in enumerate((0.05, 0.2)):
        for j, rank in enumerate((2, 8)):
            folder = tmp_path / f"kl{coef}_r{rank}"
            make_run(folder, effect=0.1 + 0.2 * i + 0.1 * j, drift=0.5 - 0.2 * i + 0.1 * j,
                     overrides={"kl.coef": coef, "lora.rank": rank})
            folders.append(folder)
    return folders


def test_formats(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folders = _grid(tmp_path)
    rows = as_json(capsys, folders)
    required = {"run", "harm_before", "harm_after", "judge_before", "judge_after", "kl", "wall_s", "peak_rss_mb",
                "pareto", "harm_rel_change", "harm_diff_ci", "p_value", "p_holm", "verdict", "kl.coef", "lora.rank"}
    assert len(rows) == 4 and all(required <= set(r) for r in rows)
    assert "run.seed" not in rows[0]  # only the config keys that differ become columns
    assert [(r["kl.coef"], r["lora.rank"]) for r in rows] == [(0.05, 2), (0.05, 8), (0.2, 2), (0.2, 8)]

    out, err = run_compare(capsys, folders, "csv")
    parsed = list(csv.DictReader(io.StringIO(out)))
    assert [r["run"] for r in parsed] == [r["run"] for r in rows]
    assert float(parsed[0]["harm_diff_ci_lo"]) == pytest.approx(rows[0]["harm_diff_ci"][0])
    assert "pareto" in err  # notes go to stderr so the CSV stays parseable

    out, _ = run_compare(capsys, folders, "md")
    table = [line for line in out.splitlines() if line.startswith("|")]
    assert len(table) == 2 + 4 and table[1].startswith("|---|")
    assert {len(line.split(" | ")) for line in table[2:]} == {len(table[0].split(" | "))}

    out, _ = run_compare(capsys, folders, "table")
    header = out.splitlines()[0]
    assert header.startswith("run") and "kl.coef" in header and "lora.rank" in header and "pareto" in header


def test_same_prompts_pair_runs(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    make_run(tmp_path / "a", effect=0.2, drift=0.1)
    make_run(tmp_path / "b", effect=0.5, drift=0.3)
    out, _ = run_compare(capsys, [tmp_path / "a", tmp_path / "b"])
    assert "same 24 held-out prompts" in out and "DIFFERENT" not in out
    rows = as_json(capsys, [tmp_path / "a", tmp_path / "b"])
    first = np.array(json.loads((tmp_path / "a" / "report.json").read_text())["evaluation"]["per_prompt"]["harm_after"])
    second = np.array(json.loads((tmp_path / "b" / "report.json").read_text())["evaluation"]["per_prompt"]["harm_after"])
    assert rows[1]["vs_first_paired"] is True
    # paired sign-flip permutation test of the mean difference, reference scipy.stats.permutation_test
    ref = stats.permutation_test((second - first,), np.mean, permutation_type="samples", vectorized=True,
                                 n_resamples=200, rng=np.random.default_rng(0))
    assert rows[1]["vs_first_p"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_different_prompts_are_unpaired(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    make_run(tmp_path / "a", effect=0.2, drift=0.1, prompt_set=0)
    make_run(tmp_path / "b", effect=0.5, drift=0.3, prompt_set=1, n=30)
    out, _ = run_compare(capsys, [tmp_path / "a", tmp_path / "b"])
    assert "DIFFERENT held-out prompts" in out and "UNPAIRED" in out
    rows = as_json(capsys, [tmp_path / "a", tmp_path / "b"])
    assert rows[0]["prompt_digest"] != rows[1]["prompt_digest"] and rows[1]["vs_first_paired"] is False
    first = np.array(json.loads((tmp_path / "a" / "report.json").read_text())["evaluation"]["per_prompt"]["harm_after"])
    second = np.array(json.loads((tmp_path / "b" / "report.json").read_text())["evaluation"]["per_prompt"]["harm_after"])
    # permutation test of the difference in means between independent sets, reference scipy.stats.permutation_test
    ref = stats.permutation_test((first, second), lambda a, b, axis: b.mean(axis) - a.mean(axis),
                                 permutation_type="independent", vectorized=True, n_resamples=200,
                                 rng=np.random.default_rng(0))
    assert rows[1]["vs_first_p"] == pytest.approx(ref.pvalue, rel=1e-12)


def test_plots_and_reports(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folders = _grid(tmp_path / "runs")
    plots = tmp_path / "plots"
    run_compare(capsys, folders, plot_dir=str(plots), report=str(tmp_path / "cmp.md"))
    files = sorted(p.name for p in plots.iterdir())
    assert files == ["before_after.png", "harm_vs_kl.png", "kl_rank_heatmap.png"]
    for name in files:
        data = (plots / name).read_bytes()
        assert data.startswith(PNG_SIGNATURE) and len(data) > 10_000
    md = (tmp_path / "cmp.md").read_text()
    assert "| run |" in md and "## Limits and cautions" in md and "](plots/harm_vs_kl.png)" in md
    assert "not a safety guarantee" in md  # alignrun.report.CAUTIONS

    run_compare(capsys, folders[:2], plot_dir=str(tmp_path / "two"), report=str(tmp_path / "cmp.html"))
    assert not (tmp_path / "two" / "kl_rank_heatmap.png").exists()  # one kl.coef value is not a grid
    page = (tmp_path / "cmp.html").read_text()
    assert page.startswith("<!doctype html>") and "<table>" in page and '<img src="data:image/png;base64,' in page
    assert "not a safety guarantee" in page
    with pytest.raises(UserError, match=r"\.txt.*use a \.md or \.html"):
        compare.compare_cli([str(folders[0])], fmt="table", plot_dir=None, report=str(tmp_path / "cmp.txt"))


def test_sweep_folder_with_a_failed_trial(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    root = tmp_path / "sweep"
    trials = []
    for coef in (0.05, 0.1, 0.2):
        name = f"kl.coef={coef}"
        trials.append({"name": name, "overrides": {"kl.coef": coef}, "folder": name, "state": "finished",
                       "error": None, "wall_s": 10.0})
        if coef == 0.1:
            RunFolder(root / name).set_status("failed", step=1, error="loss is nan at step 1")
            trials[-1].update(state="failed", error="stopped: loss is nan at step 1")
        else:
            make_run(root / name, effect=coef, drift=coef, overrides={"kl.coef": coef})
    write_json_atomic(root / "sweep.json", {"schema": "alignrun.sweep/1", "config": "x.toml",
                                            "grid": {"kl.coef": [0.05, 0.1, 0.2]}, "seeds": [], "trials": trials})
    out, _ = run_compare(capsys, [root])
    assert "1 of 3 trials left out: kl.coef=0.1 (failed: stopped: loss is nan at step 1)" in out
    rows = as_json(capsys, [root])
    assert [r["run"] for r in rows] == ["kl.coef=0.05", "kl.coef=0.2"]


def test_unknown_schema_and_missing_runs(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    report = make_run(tmp_path / "old", effect=0.2, drift=0.1)
    write_json_atomic(tmp_path / "old" / "report.json", {**report, "schema": "alignrun.report/0"})
    with pytest.raises(UserError, match=r"old/report.json: report schema 'alignrun.report/0' is not one"):
        compare.compare_cli([str(tmp_path / "old")], fmt="table", plot_dir=None, report=None)
    # through the command line: a clear one-line error and exit code 2, no traceback
    assert main(["compare", str(tmp_path / "old")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("alignrun: error:") and "alignrun.report/0" in err and "Traceback" not in err

    with pytest.raises(UserError, match="no such folder"):
        compare.compare_cli([str(tmp_path / "nowhere")], fmt="table", plot_dir=None, report=None)
    RunFolder(tmp_path / "running").set_status("running", step=2)
    # no live process holds its lock, so the status reader calls it dead (alignrun.runfolder.read_status)
    with pytest.raises(UserError, match=r"running: the run has no report.json \(status: dead, step 2; .*no process holds"):
        compare.compare_cli([str(tmp_path / "running")], fmt="table", plot_dir=None, report=None)
    del report["evaluation"]["per_prompt"]
    write_json_atomic(tmp_path / "cut" / "report.json", report)
    with pytest.raises(UserError, match="field 'evaluation.per_prompt.harm_before' is missing"):
        compare.compare_cli([str(tmp_path / "cut")], fmt="table", plot_dir=None, report=None)
