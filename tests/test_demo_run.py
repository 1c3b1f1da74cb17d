"""The shortened demo, end to end on the demo models: harm falls on held-out prompts by both judges."""

from __future__ import annotations

import json

import pytest

from alignrun.demo.run import run_demo


@pytest.mark.slow
def test_quick_demo_lowers_harm_by_both_judges(demo_models, tmp_path, capsys) -> None:
    out = tmp_path / "demo"
    assert run_demo(out=str(out), quick=True, quiet=True, overrides=[]) == 0
    printed = capsys.readouterr().out
    assert "harm mean (reward clf)" in printed and "sample pairs" in printed
    report = json.loads((out / "report.json").read_text())
    ev = report["evaluation"]
    # our classifier, and alt-profanity-check (trained outside this project) as the independent judge
    assert ev["after"]["reward_classifier"]["mean"] < ev["before"]["reward_classifier"]["mean"]
    assert ev["after"]["judge"]["mean"] < ev["before"]["judge"]["mean"]
    assert not [a for a in report["alarms"] if a["code"] == "harm-increased"]
    markdown = (out / "report.md").read_text()
    for section in ("## Alarms", "## Held-out harm before and after", "## Guards", "## Training and preflight",
                    "## Sample pairs", "## Limits and cautions"):
        assert section in markdown
    assert json.loads((out / "preflight.json").read_text())["verdict"] == "ok"
