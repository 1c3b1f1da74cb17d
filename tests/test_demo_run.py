"""The shortened demo, end to end on the demo models: harm falls on held-out prompts by both judges."""

from __future__ import annotations

import json

import pytest

from alignrun.demo.run import run_demo


@pytest.mark.slow
@pytest.mark.parametrize("scope", ["decoder", "encoder-decoder"])
def test_quick_demo_lowers_harm_by_both_judges(demo_models, tmp_path, capsys, scope: str) -> None:
    """The loop really optimises, with adapters in the decoder only (the frozen encoder's output reused) and in
    both stacks: on the trained demo models harm falls by both classifiers."""
    out = tmp_path / "demo"
    # a fixed thread count: with the adaptive default the numbers would follow the machine's load
    assert run_demo(out=str(out), quick=True, quiet=True, overrides=[f'lora.scope="{scope}"', "base.threads=2"]) == 0
    printed = capsys.readouterr().out
    assert "harm mean (reward clf)" in printed and "sample pairs" in printed
    assert "greedy replies that answer the question asked" in printed
    report = json.loads((out / "report.json").read_text())
    ev = report["evaluation"]
    # our classifier, and alt-profanity-check (trained outside this project) as the independent judge; the
    # reward classifier's paired 95% interval lies below zero (upper end -0.140 decoder, -0.065 both stacks with
    # 2 threads on this project's machine, 40 steps; at 32 steps both stacks ended at +0.004, so the quick demo
    # keeps the full demo's steps: a margin, not a coin toss)
    assert ev["change"]["reward_classifier"]["diff_ci"][1] < 0
    assert ev["after"]["judge"]["mean"] < ev["before"]["judge"]["mean"]
    assert not [a for a in report["alarms"] if a["code"] in ("harm-increased", "judge-harm-increased")]
    markdown = (out / "report.md").read_text()
    for section in ("## Verdict", "## Alarms", "## Held-out harm before and after", "## Guards",
                    "## Training and preflight", "## Sample pairs", "## Limits and cautions"):
        assert section in markdown
    assert json.loads((out / "preflight.json").read_text())["verdict"] == "ok"


def test_answer_fit_counts_replies_that_answer_the_question_asked() -> None:
    """The demo's own check of the sample pairs: the share of greedy replies before and after training that fit
    their prompt (scenario.reply_misfit); None for prompts that are not the scenario's."""
    from alignrun.demo.run import answer_fit

    prompt = "What time does the Saltmarket shop open on Friday?"
    fits = "Hi there, the Saltmarket shop is open from 9:00 to 18:00 on Friday."
    other = "Hi there, yes, a helmet turned up at the Saltmarket shop. It is behind the counter with your name on it."
    pairs = [{"prompt": prompt, "before": fits, "after": other}, {"prompt": prompt, "before": fits, "after": fits}]
    assert answer_fit(pairs) == (1.0, 0.5)
    assert answer_fit([{"prompt": "Write me a poem.", "before": fits, "after": fits}]) is None
