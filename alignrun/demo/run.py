"""`alignrun demo`: build the invented service-desk models if missing, then run the main job on them."""

from __future__ import annotations

import json
from pathlib import Path

import alignrun
from alignrun.errors import UserError

DEMO_CONFIG = Path(alignrun.__file__).resolve().parent.parent / "configs" / "demo.toml"
# The CI-sized demo: fewer steps and held-out prompts, same models.
QUICK = ["ppo.steps=32", "evaluation.max_prompts=40", "evaluation.samples_per_prompt=2"]


def run_demo(out: str | None, quick: bool, quiet: bool, overrides: list[str], overwrite: bool = False) -> int:
    from alignrun.config import load_config
    from alignrun.demo.build import build_demo
    from alignrun.report import summary_text
    from alignrun.runfolder import check_run_folder
    from alignrun.trainer import run_experiment

    if not DEMO_CONFIG.is_file():
        raise UserError(f"{DEMO_CONFIG}: the demo config is missing; run the demo from a checkout of the repository")
    cfg = load_config(DEMO_CONFIG, [*(QUICK if quick else []), *overrides])
    target = Path(out or cfg.run.out or Path("runs") / ("demo-quick" if quick else "demo"))
    check_run_folder(target, resume=False, overwrite=overwrite)  # before the models are built
    build_demo(quiet=quiet)
    report = run_experiment(cfg, target, quiet=quiet, overwrite=overwrite)
    print(summary_text(report))
    print("\nsample pairs (held-out prompt -> greedy reply before / after):")
    pairs = [json.loads(ln) for ln in (target / "pairs.jsonl").read_text().splitlines()]
    changed = [p for p in pairs if p["before"] != p["after"]] or pairs
    for p in sorted(changed, key=lambda p: p["harm_after"] - p["harm_before"])[:4]:
        print(f"\n  prompt: {p['prompt']}\n  before: {p['before']}  [harm {p['harm_before']:.2f}]"
              f"\n  after:  {p['after']}  [harm {p['harm_after']:.2f}]")
    print(f"\nrun folder: {target}  (report.html or report.md for people, report.json for `alignrun compare`)")
    return 0
