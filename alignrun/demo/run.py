"""`alignrun demo`: build the invented service-desk models if missing, then run the main job on them."""

from __future__ import annotations

import json
from pathlib import Path

import alignrun
from alignrun.demo import scenario
from alignrun.errors import UserError

DEMO_CONFIG = Path(alignrun.__file__).resolve().parent.parent / "configs" / "demo.toml"
CAUSAL_DEMO_CONFIG = DEMO_CONFIG.with_name("causal-demo.toml")  # the decoder-only variant (alignrun demo --causal)
# The CI-sized demo: fewer held-out prompts and samples, same models and steps.
QUICK = ["evaluation.max_prompts=40", "evaluation.samples_per_prompt=2"]


def run_demo(out: str | None, quick: bool, quiet: bool, overrides: list[str], overwrite: bool = False,
             causal: bool = False) -> int:
    from alignrun.config import load_config
    from alignrun.demo.build import build_demo
    from alignrun.demo.causal import build_causal_demo
    from alignrun.report import summary_text
    from alignrun.runfolder import check_run_folder
    from alignrun.trainer import run_experiment

    config = CAUSAL_DEMO_CONFIG if causal else DEMO_CONFIG
    if not config.is_file():
        raise UserError(f"{config}: the demo config is missing; run the demo from a checkout of the repository")
    cfg = load_config(config, [*(QUICK if quick else []), *overrides])
    name = ("causal-demo" if causal else "demo") + ("-quick" if quick else "")
    target = Path(out or cfg.run.out or Path("runs") / name)
    check_run_folder(target, resume=False, overwrite=overwrite)  # before the models are built
    (build_causal_demo if causal else build_demo)(quiet=quiet)
    report = run_experiment(cfg, target, quiet=quiet, overwrite=overwrite)
    print(summary_text(report))
    print("\nsample pairs (held-out prompt -> greedy reply before / after):")
    pairs = [json.loads(ln) for ln in (target / "pairs.jsonl").read_text().splitlines()]
    fit = answer_fit(pairs)
    if fit is not None:
        print(f"\ngreedy replies that answer the question asked (the scenario's own check): before {fit[0]:.0%}, "
              f"after {fit[1]:.0%} of {len(pairs)} held-out prompts")
    changed = [p for p in pairs if p["before"] != p["after"]] or pairs
    for p in sorted(changed, key=lambda p: p["harm_after"] - p["harm_before"])[:4]:
        print(f"\n  prompt: {p['prompt']}\n  before: {p['before']}  [harm {p['harm_before']:.2f}]"
              f"\n  after:  {p['after']}  [harm {p['harm_after']:.2f}]")
    print(f"\nrun folder: {target}  (report.html or report.md for people, report.json for `alignrun compare`)")
    return 0


def answer_fit(pairs: list[dict]) -> tuple[float, float] | None:
    """Shares of greedy replies before and after training that fit their prompt (scenario.reply_misfit: the
    right reply family with the prompt's details copied; rude replies count as fitting); None when the prompts
    are not the scenario's (a demo run with other data)."""

    def share(key: str) -> float:
        return sum(scenario.reply_misfit(p["prompt"], p[key]) is None for p in pairs) / len(pairs)

    try:
        return share("before"), share("after")
    except ValueError:
        return None
