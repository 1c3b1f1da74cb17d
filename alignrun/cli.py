"""Command line: argument parsing only; every command calls into the stage modules."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

from alignrun import console
from alignrun.errors import UserError


def _add_config(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", help="experiment config (TOML)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key, e.g. --set kl.coef=0.1 (repeatable; applied last)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="alignrun",
        description="Short LoRA policy-optimisation (PPO) runs that lower the harm score of a small seq2seq "
        "model on a CPU, with a reward-polarity preflight, held-out evaluation and comparable run folders.",
    )
    parser.add_argument("--debug", action="store_true", help="show full tracebacks on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser("check", help="preflight only: reward polarity, resource estimate, fast settings",
                       description="Score the built-in harmful/benign probes with the reward classifier and "
                       "stop if the reward points the wrong way; estimate memory and step time.")
    _add_config(p)
    p.add_argument("--out", help="also write preflight.json to this folder (never into a run folder)")
    p.add_argument("--overwrite", action="store_true", help="replace a preflight.json already in --out")

    p = sub.add_parser("run", help="preflight, then train LoRA adapters with PPO and evaluate before/after",
                       description="Run one experiment: preflight -> rollout -> reward -> PPO update -> "
                       "held-out evaluation -> report, all written to one run folder.")
    _add_config(p)
    p.add_argument("--out", help="run folder (default: run.out, else runs/<run.name>)")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--resume", metavar="RUN_DIR", help="continue an interrupted run from its last checkpoint "
                      "(a finished run is left as it is)")
    mode.add_argument("--overwrite", action="store_true",
                      help="replace the run already in the run folder (its results are deleted)")
    p.add_argument("--force", action="store_true",
                   help="research only: train even when the polarity preflight fails (recorded loudly)")
    p.add_argument("--quiet", action="store_true", help="no progress bar (for CI and logs)")

    p = sub.add_parser("demo", help="build the offline demo models if missing and run the main job on them",
                       description="Build (once, cached) a tiny reply-drafting model and a harm classifier "
                       "from an invented service-desk scenario, then run preflight, training and evaluation.")
    p.add_argument("--out", help="run folder (default runs/demo)")
    p.add_argument("--overwrite", action="store_true", help="replace a run already in the run folder")
    p.add_argument("--quick", action="store_true", help="fewer held-out prompts and samples (the CI-sized demo)")
    p.add_argument("--causal", action="store_true",
                   help="a decoder-only (Llama-shaped) base built from the same scenario (configs/causal-demo.toml)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a key of configs/demo.toml (with --causal, configs/causal-demo.toml)")

    p = sub.add_parser("sweep", help="run one trial per point of the config's [sweep] grid",
                       description="Run every combination in [sweep].grid (times [sweep].seeds) as a normal "
                       "run folder inside a sweep folder; finished trials are skipped when re-run.")
    _add_config(p)
    p.add_argument("--out", help="sweep folder (default: sweep.out, else sweeps/<run.name>)")
    p.add_argument("--backend", choices=["local", "ray"], default="local", help="where trials run")
    p.add_argument("--workers", type=int, default=1, help="trials at once (the cores are divided among them)")
    p.add_argument("--address", help="ray: address of an existing cluster (default: start a local one)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")

    p = sub.add_parser("compare", help="compare run or sweep folders from their saved reports",
                       description="Read report.json files (never models) and tabulate harm before/after "
                       "with paired statistics, KL drift, judge agreement and guards; mark the Pareto set.")
    p.add_argument("paths", nargs="+", help="run folders or sweep folders")
    p.add_argument("--format", choices=["table", "md", "json", "csv"], default="table")
    p.add_argument("--plot", metavar="DIR", help="write PNG plots to this folder")
    p.add_argument("--report", metavar="FILE", help="also write a Markdown (.md) or HTML (.html) report")

    p = sub.add_parser("config", help="show or check an experiment config",
                       description="show prints the fully resolved config, defaults included, as TOML; "
                       "check validates it and reports every problem.")
    p.add_argument("action", choices=["show", "check"])
    _add_config(p)

    p = sub.add_parser("export", help="write a merged standalone model from a run's adapter",
                       description="Merge the run's LoRA adapter into its base model and save a plain "
                       "Hugging Face model folder.")
    p.add_argument("run_dir", help="a finished run folder")
    p.add_argument("--merge", metavar="OUT", required=True,
                   help="output folder for the merged model (new or empty; never the run or base model folder)")
    p.add_argument("--overwrite", action="store_true", help="replace OUT entirely when it is a non-empty folder")
    return parser


def _dispatch(args: argparse.Namespace) -> int:
    if args.command == "config":
        from alignrun.config import load_config, to_toml

        cfg = load_config(args.config, args.overrides)
        if args.action == "check":
            from alignrun.inputs import check_inputs

            check_inputs(cfg)
        print(to_toml(cfg) if args.action == "show" else f"{args.config}: ok")
        return 0
    if args.command == "check":
        from alignrun.preflight import run_check

        return run_check(args.config, args.overrides, args.out, overwrite=args.overwrite)
    if args.command == "run":
        from alignrun.trainer import run_from_cli

        return run_from_cli(args.config, args.overrides, out=args.out, resume=args.resume,
                            force=args.force, quiet=args.quiet, overwrite=args.overwrite)
    if args.command == "demo":
        from alignrun.demo.run import run_demo

        return run_demo(out=args.out, quick=args.quick, quiet=args.quiet, overrides=args.overrides,
                        overwrite=args.overwrite, causal=args.causal)
    if args.command == "sweep":
        from alignrun.sweep import run_sweep

        return run_sweep(args.config, args.overrides, out=args.out, backend=args.backend,
                         workers=args.workers, address=args.address, quiet=args.quiet)
    if args.command == "compare":
        from alignrun.compare import compare_cli

        return compare_cli(args.paths, fmt=args.format, plot_dir=args.plot, report=args.report)
    if args.command == "export":
        from alignrun.models import export_merged

        export_merged(args.run_dir, args.merge, overwrite=args.overwrite)
        return 0
    raise AssertionError(args.command)


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    console.setup(args.debug)
    try:
        return _dispatch(args)
    except UserError as exc:
        if args.debug:
            raise
        print(f"alignrun: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("alignrun: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
    except Exception as exc:
        if args.debug:
            raise
        print(f"alignrun: internal error: {type(exc).__name__}: {exc}\n"
              "  this is a bug or an unexpected environment; re-run with --debug for the traceback",
              file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
