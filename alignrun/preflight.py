"""Preflight: does the reward point the right way? Score labelled probes and give a polarity verdict.

The reward classifier scores the built-in probes (alignrun/resources/probes.jsonl: invented lines of several
kinds of harm and of benign lines that are blunt, complaining or use strong words harmlessly) plus any files in
`reward.probes`. The verdict is decided on the built-in insults and everyday lines plus every user probe; per
kind, the AUROC against the verdict probes of the other class shows what the reward misses (a warning).
Its harm score must rank harmful probes above benign ones (AUROC >= reward.min_auroc, with a 95% interval
above 0.5) AND move: mean P(harm) on harmful probes at least reward.min_separation above benign ones. The
transformed reward must rank benign probes above harmful ones. Verdicts:

    ok             all of that holds
    weak           harm points the right way (interval above 0.5, enough separation) but AUROC < min_auroc
    inverted       harm ranks benign probes higher: the wrong label is named harmful
    uninformative  harm scores barely move (separation < min_separation), or rank no better than chance
    sign-wrong     harm separates, but the transform/scale/clip makes benign texts score lower (reward only)

The outside judge gets the same check on the same probes. Training stops (exit code 3) unless the reward is
ok and the judge is neither inverted nor uninformative; --force records that it went ahead anyway.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np
from scipy.stats import rankdata

from alignrun.budget import describe, describe_fast_settings, emulated_bf16_warning, estimate, fast_settings
from alignrun.config import RewardSection, ScorerSection, load_config
from alignrun.errors import UserError
from alignrun.reward import Scorer, describe_transform, load_scorer, reward_from_scores
from alignrun.runfolder import run_files, write_json_atomic

PROBE_ROW = ('{"text": "...", "label": "harmful" or "benign", "kind": "threat"} ("kind" optional; the older '
             '{"text": "...", "harmful": true} form is read too)')
UNSORTED = "unsorted"  # the kind of probe rows that name none
# The verdict is decided on the built-in insults and everyday lines, which any harm classifier must order,
# plus every probe the user adds; the other built-in kinds measure coverage and give warnings.
VERDICT_KINDS = frozenset({"insult", "everyday"})
EXIT_POLARITY = 3
Z95 = 1.959963984540054  # two-sided 95% normal quantile, scipy.stats.norm.ppf(0.975)
TOLERANCE = 1e-9  # AUROC comparisons: 1 - 0.8 is 0.19999999999999996 in floating point


@dataclass
class Probe:
    text: str
    harmful: bool
    kind: str  # e.g. "threat", "complaint"; UNSORTED when the row names none
    source: str  # "built-in" or the probe file it came from


@dataclass
class ProbeScore:
    text: str
    harmful: bool
    kind: str
    source: str
    harm: float  # P(harmful) from the classifier
    reward: float | None  # the transformed reward (None for the judge)


@dataclass
class KindResult:
    kind: str
    harmful: bool  # a kind of harmful or of benign probes
    n: int
    auroc: float  # harmful kinds: these probes vs every benign probe; benign kinds: every harmful probe vs these
    missed: bool  # auroc below min_auroc: the score does not tell this kind from the other class


@dataclass
class PolarityReport:
    verdict: str  # ok | weak | inverted | uninformative | sign-wrong
    message: str
    auroc: float  # AUROC of P(harm) for harmful vs benign probes
    auroc_se: float  # its standard error (Hanley & McNeil 1982)
    auroc_interval: tuple[float, float]  # 95% normal interval, auroc +- 1.96 se, within [0, 1]
    gap: float  # mean P(harm) on harmful probes minus on benign probes
    min_separation: float  # |gap| below this: the scores barely move ("uninformative")
    reward_auroc: float | None  # AUROC of the reward for benign vs harmful probes (None for the judge)
    reward_gap: float | None  # mean reward on benign probes minus on harmful probes (None for the judge)
    min_auroc: float  # both AUROCs must reach this for "ok"
    inverted_below: float  # harm AUROC at or below this is "inverted" (1 - min_auroc)
    scorer: str
    head: str  # how the classifier's outputs are read as P(harm) (the assumption made)
    executes_code: bool
    transform: str | None  # the reward formula (None for the judge)
    label_aurocs: dict[str, float]  # AUROC of each class's own probability for harmful vs benign
    suggestion: str | None  # the exact config change that would fix the verdict, when there is one
    n_harmful: int  # harmful probes the verdict is decided on
    n_benign: int  # benign probes the verdict is decided on
    probe_files: list[str]
    kinds: list[KindResult] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)  # e.g. the kinds the score misses
    role: str = "reward"  # "reward" or "judge"
    forced: bool = False  # set when training went ahead with --force despite a failed verdict
    probes: list[ProbeScore] = field(default_factory=list)


def _parse_probes(text: str, name: str) -> list[Probe]:
    probes = []
    for row, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        where = f"{name}: row {row}"
        try:
            item = json.loads(line)
        except json.JSONDecodeError as exc:
            raise UserError(f"{where}: not valid JSON ({exc.msg}); expected one object per line: {PROBE_ROW}") from None
        if not isinstance(item, dict):
            raise UserError(f"{where}: found {type(item).__name__} {item!r}; expected an object: {PROBE_ROW}")
        value = item.get("text")
        if not isinstance(value, str) or not value.strip():
            raise UserError(f"{where}: 'text' is {value!r}; expected a non-empty string: {PROBE_ROW}")
        if "label" in item:
            label = item["label"]
            if label not in ("harmful", "benign"):
                raise UserError(f"{where}: 'label' is {label!r}; expected \"harmful\" or \"benign\": {PROBE_ROW}")
            flag = label == "harmful"
        else:
            flag = item.get("harmful")
            if not isinstance(flag, bool):
                raise UserError(f"{where}: 'harmful' is {flag!r}; expected true or false: {PROBE_ROW}")
        kind = item.get("kind", UNSORTED)
        if not isinstance(kind, str) or not kind.strip():
            raise UserError(f"{where}: 'kind' is {kind!r}; expected a short non-empty name: {PROBE_ROW}")
        probes.append(Probe(value, flag, kind.strip(), name))
    if not probes:
        raise UserError(f"{name}: no probe rows; expected JSONL with one object per line: {PROBE_ROW}")
    return probes


def builtin_probes() -> list[Probe]:
    text = (resources.files("alignrun") / "resources" / "probes.jsonl").read_text(encoding="utf-8")
    return _parse_probes(text, "built-in")


def load_probes(files: Sequence[str] = ()) -> list[Probe]:
    """The built-in probes plus every file listed in reward.probes."""
    probes = builtin_probes()
    for name in files:
        path = Path(name)
        if not path.is_file():
            raise UserError(f"reward.probes: {path} does not exist; expected a JSONL file of {PROBE_ROW} rows")
        try:
            text = path.read_text(encoding="utf-8")
        except UnicodeDecodeError:
            raise UserError(f"reward.probes: {path} is not UTF-8 text; expected JSONL of {PROBE_ROW} rows") from None
        probes += _parse_probes(text, str(path))
    return probes


def auroc(scores: Sequence[float] | np.ndarray, positive: Sequence[bool] | np.ndarray) -> float:
    """Area under the ROC curve for positives scoring higher; ties count half."""
    s, y = np.asarray(scores, dtype=float), np.asarray(positive, dtype=bool)
    n1, n0 = int(y.sum()), int((~y).sum())
    if n1 == 0 or n0 == 0:
        raise ValueError("AUROC needs at least one positive and one negative")
    ranks = rankdata(s)  # average ranks for ties, so a tied pair counts 1/2
    u = ranks[y].sum() - n1 * (n1 + 1) / 2  # Mann & Whitney 1947: U from the positives' rank sum
    return float(u / (n1 * n0))  # Hanley & McNeil 1982: AUROC = U / (n1 * n0)


def auroc_se(a: float, n1: int, n2: int) -> float:
    """Standard error of an AUROC a from n1 positives and n2 negatives (Hanley & McNeil 1982, eq. 2)."""
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)  # Hanley & McNeil 1982: Q1 = A/(2-A), Q2 = 2A^2/(1+A)
    var = (a * (1 - a) + (n1 - 1) * (q1 - a * a) + (n2 - 1) * (q2 - a * a)) / (n1 * n2)
    return float(np.sqrt(max(var, 0.0)))


def harm_verdict(a: float, interval: tuple[float, float], gap: float, min_auroc: float,
                 min_separation: float) -> str:
    """ok | weak | inverted | uninformative from the harm score's AUROC, its 95% interval and its separation."""
    low, high = interval
    if abs(gap) < min_separation:
        return "uninformative"  # the scores barely move, whatever their order
    if a >= min_auroc - TOLERANCE and low > 0.5 and gap > 0:
        return "ok"
    if gap < 0 and (a <= 1 - min_auroc + TOLERANCE or high < 0.5):
        return "inverted"
    if low > 0.5 and gap > 0:
        return "weak"
    return "uninformative"


def kind_results(harm: np.ndarray, probes: Sequence[Probe], in_verdict: np.ndarray,
                 min_auroc: float) -> list[KindResult]:
    """AUROC per kind against the verdict's probes of the other class: each harmful kind against the benign
    verdict probes (does the score see it?), the harmful verdict probes against each benign kind (does the
    score tell it from harm?)."""
    y = np.array([p.harmful for p in probes])
    kinds = np.array([p.kind for p in probes])
    out = []
    for harmful in (True, False):
        for kind in dict.fromkeys(p.kind for p in probes if p.harmful == harmful):
            mine = (kinds == kind) & (y == harmful)
            keep = mine | (in_verdict & (y != harmful))
            a = auroc(harm[keep], y[keep])
            out.append(KindResult(kind, harmful, int(mine.sum()), a, a < min_auroc - TOLERANCE))
    return out


def _coverage_warning(kinds: list[KindResult], role: str) -> list[str]:
    missed = [k for k in kinds if k.missed and k.harmful]
    confused = [k for k in kinds if k.missed and not k.harmful]
    warnings = []
    if missed:
        warnings.append(f"the {role} misses these kinds of harm (AUROC against the benign verdict probes below min_auroc): "
                        + ", ".join(f"{k.kind} {k.auroc:.3f} ({k.n} probes)" for k in missed)
                        + ("; the reward does not see them, so training will not steer away from them" if role == "reward"
                           else "; the judge does not see them, so its harm figures will not count them"))
    if confused:
        warnings.append(f"the {role} mistakes these benign kinds for harm (AUROC of the harmful verdict probes "
                        "against them below min_auroc): " + ", ".join(f"{k.kind} {k.auroc:.3f} ({k.n} probes)" for k in confused)
                        + ("; training may also push away from such harmless replies" if role == "reward"
                           else "; its harm figures will count such harmless replies as harm"))
    return warnings


def _inverted_fix(section: ScorerSection, key: str, label_aurocs: dict[str, float],
                  harmful: list[str]) -> tuple[str, str | None]:
    """(a sentence saying what would be correct, the exact config change or None) for an inverted harm score."""
    labels = list(label_aurocs)
    others = {name: a for name, a in label_aurocs.items() if name not in harmful}
    if not others and section.backend == "callable":
        return (f"There is no other class to choose: make {section.source} return P(harmful), i.e. 1 minus what "
                "it returns now.", None)
    if not others:
        return (f"Every class of {section.source} is named harmful and none ranks harmful probes higher; check "
                "that the classifier was trained for this kind of harm.", None)
    best = max(others, key=lambda name: others[name])
    # a config line that loads as it is (also as --set KEY=VALUE): names where the model has them, else the index
    change = f"{key}.harmful_index = {labels.index(best)}" if section.harmful_index is not None else \
        f'{key}.harmful_labels = ["{best}"]'
    if others[best] < section.min_auroc:
        return (f"No other class separates the harmful probes well either (best: {best!r}, AUROC "
                f"{others[best]:.3f}); check that the classifier was trained for this kind of harm.", change)
    return f"Class {best!r} separates the harmful probes best (AUROC {others[best]:.3f}): set {change}.", change


def _other_class(section: ScorerSection, key: str, label_aurocs: dict[str, float], label_gaps: dict[str, float],
                 harmful: list[str]) -> tuple[str | None, str | None]:
    """When the named harmful class says nothing but another class ranks and separates the probes: that class."""
    others = {name: a for name, a in label_aurocs.items() if name not in harmful
              and label_gaps[name] >= section.min_separation}
    if not others or max(others.values()) < section.min_auroc - TOLERANCE:
        return None, None
    best = max(others, key=lambda name: others[name])
    change = f"{key}.harmful_index = {list(label_aurocs).index(best)}" if section.harmful_index is not None else \
        f'{key}.harmful_labels = ["{best}"]'
    return (f"But class {best!r} does separate them (AUROC {others[best]:.3f}); it is probably the harmful one: "
            f"set {change}."), change


def _harm_text(harmful_names: list[str]) -> str:
    return "P(" + " or ".join(harmful_names) + ")"


def _sign_fix(section: RewardSection, unclipped: np.ndarray) -> tuple[str, str | None]:
    """(what to do, the config line that does it or None) for a reward that does not rank benign texts higher."""
    if section.scale < 0:
        return f"reward.scale = {-section.scale} instead of {section.scale}", f"reward.scale = {-section.scale}"
    if section.scale == 0:
        return "reward.scale = 1.0 (a zero scale makes every reward equal)", "reward.scale = 1.0"
    if section.clip is not None:
        widest = float(np.abs(unclipped).max())
        # the next power of ten at or above the widest unclipped reward: clipping then changes nothing
        clip = float(10 ** np.ceil(np.log10(widest))) if widest > 0 else 1.0
        return (f"reward.clip = {clip:g}: the clip at {section.clip:g} flattens rewards that reach {widest:.3g}",
                f"reward.clip = {clip:g}")
    return "reward.transform, reward.scale and reward.clip: none of them alone explains it", None


def check_polarity(scorer: Scorer, section: ScorerSection, key: str = "reward",
                   probe_files: Sequence[str] | None = None) -> PolarityReport:
    """Score the probes and decide whether the classifier's harm score points the right way; for the reward
    (a RewardSection) also whether its transformed reward does, i.e. whether training would lower harm.

    key names the section in messages ("reward" or "evaluation.judge"); probe_files defaults to section.probes.
    """
    role = "reward" if key == "reward" else "judge"
    files = list(probe_files if probe_files is not None else getattr(section, "probes", []))
    probes = load_probes(files)
    scores = scorer.score([p.text for p in probes])
    all_harm = scores.harm
    all_reward = reward_from_scores(scores, section) if isinstance(section, RewardSection) else None
    verdict_set = np.array([p.source != "built-in" or p.kind in VERDICT_KINDS for p in probes])
    kinds = kind_results(all_harm, probes, verdict_set, section.min_auroc)
    y = np.array([p.harmful for p in probes])[verdict_set]
    harm = all_harm[verdict_set]
    n1, n0 = int(y.sum()), int((~y).sum())
    a = auroc(harm, y)
    se = auroc_se(a, n1, n0)
    interval = (max(0.0, a - Z95 * se), min(1.0, a + Z95 * se))
    gap = float(harm[y].mean() - harm[~y].mean())
    ra = reward_gap = None
    if all_reward is not None:
        reward = all_reward[verdict_set]
        ra, reward_gap = auroc(reward, ~y), float(reward[~y].mean() - reward[y].mean())
    probs = scores.class_probabilities()[verdict_set]
    label_aurocs = {name: auroc(probs[:, j], y) for j, name in enumerate(scores.labels)}
    label_gaps = {name: float(probs[y, j].mean() - probs[~y, j].mean()) for j, name in enumerate(scores.labels)}
    harmful_names = [scores.labels[j] for j in scores.harmful]
    m, sep = section.min_auroc, section.min_separation
    numbers = (f"harm AUROC {a:.3f}, 95% interval [{interval[0]:.3f}, {interval[1]:.3f}] (ok at >= {m:g}); "
               f"mean harm gap {gap:+.3f} (needs >= {sep:g})") + ("" if ra is None else f"; reward AUROC {ra:.3f}")
    transform = describe_transform(section) if isinstance(section, RewardSection) else None
    what = "training would lower harm" if role == "reward" else "the judge's harm figures are meaningful"
    suggestion = None
    verdict = harm_verdict(a, interval, gap, m, sep)
    if verdict == "ok" and isinstance(section, RewardSection) and ra is not None and ra < m - TOLERANCE:
        verdict = "sign-wrong"
        fix, suggestion = _sign_fix(section, reward_from_scores(scores, section.model_copy(update={"clip": None})))
        if ra <= 1 - m + TOLERANCE:
            effect = "makes benign texts score lower, so training would push towards harm"
        else:
            effect = ("leaves the reward flat (benign and harmful texts score nearly alike), so training would have "
                      "little or no signal to follow")
        message = (f"The classifier separates the probes, but the reward does not rank benign texts above harmful "
                   f"ones ({numbers}): {transform} {effect}. Set {fix}.")
    elif verdict == "ok":
        message = (f"The {role} points the right way: harmful probes get higher harm"
                   + (" and benign probes higher reward" if role == "reward" else "") + f" ({numbers}).")
    elif verdict == "inverted":
        fix, suggestion = _inverted_fix(section, key, label_aurocs, harmful_names)
        message = (f"The {role}'s harm score is inverted: harmful probes get a LOWER {_harm_text(harmful_names)} "
                   f"than benign ones ({numbers}), so what is named harmful behaves like the benign class"
                   + (" and training would reward harm. " if role == "reward" else
                      " and the judge would count benign replies as harm. ") + fix)
    elif verdict == "weak":
        lowered = np.floor(a * 100) / 100
        suggestion = f"{key}.min_auroc = {lowered:.2f}"
        message = (f"The {role}'s classifier points the right way but is weak ({numbers}): it ranks harmful probes "
                   f"above benign ones less often than {key}.min_auroc asks, so "
                   + ("training would lower only the harm it can see" if role == "reward" else
                      "its harm figures would miss much of the harm") +
                   f". Use a stronger classifier, or accept this one deliberately: set {suggestion}.")
    elif np.ptp(harm) == 0:
        message = (f"The {role} is uninformative: every probe gets the same harm score {harm[0]:.4g}, so nothing "
                   f"says whether {what}; use a classifier trained for this kind of harm, or check "
                   f"{key}.harmful_labels and {key}.source.")
    else:
        other, suggestion = _other_class(section, key, label_aurocs, label_gaps, harmful_names)
        if other is not None:
            advice = other
        elif abs(gap) < sep:
            advice = ("An untrained or freshly initialised classification head looks like this, whatever its AUROC; "
                      "use a classifier trained for this kind of harm. If its scores are known to be compressed on "
                      f"purpose, lower {key}.min_separation.")
        else:
            advice = f"Use a classifier trained for this kind of harm, or check {key}.harmful_labels and {key}.source."
        why = (f"the harm scores barely move ({numbers}; every P(harm) lies in [{harm.min():.3f}, {harm.max():.3f}])"
               if abs(gap) < sep else
               f"its ranking of harmful and benign probes is not clearly better than chance ({numbers})")
        message = f"The {role} is uninformative: {why}. {advice}"
    return PolarityReport(
        verdict=verdict, message=message, auroc=a, auroc_se=se, auroc_interval=interval, gap=gap,
        min_separation=sep, reward_auroc=ra, reward_gap=reward_gap, min_auroc=m,
        inverted_below=round(1 - m, 9), scorer=scorer.description, head=scorer.head, executes_code=scorer.executes_code,
        transform=transform, label_aurocs=label_aurocs, suggestion=suggestion, n_harmful=n1, n_benign=n0,
        probe_files=["built-in", *files], kinds=kinds, warnings=_coverage_warning(kinds, role), role=role,
        probes=[ProbeScore(p.text, p.harmful, p.kind, p.source, float(h), None if all_reward is None else float(r))
                for p, h, r in zip(probes, all_harm, all_reward if all_reward is not None else all_harm, strict=True)],
    )


# The judge only measures, so a weak judge is recorded (and named in the report's alarms) but does not stop.
JUDGE_STOPS = ("inverted", "uninformative")


def write_preflight(report: PolarityReport, judge: PolarityReport | None, folder: str | Path) -> Path:
    """preflight.json: the reward's report, with the judge's under "judge" (null without a judge)."""
    path = Path(folder) / "preflight.json"
    write_json_atomic(path, {**asdict(report), "judge": None if judge is None else asdict(judge)})
    return path


def check_both(scorer: Scorer, section: RewardSection, judge: Scorer | None,
               judge_section: ScorerSection | None) -> tuple[PolarityReport, PolarityReport | None]:
    """The reward's and the judge's polarity reports (the judge's None without a judge); both use the same probes."""
    report = check_polarity(scorer, section)
    judged = None
    if judge is not None and judge_section is not None:
        judged = check_polarity(judge, judge_section, "evaluation.judge", section.probes)
    return report, judged


def _stops(report: PolarityReport, judge: PolarityReport | None) -> list[PolarityReport]:
    return ([report] if report.verdict != "ok" else []) + \
        ([judge] if judge is not None and judge.verdict in JUDGE_STOPS else [])


def require_polarity(scorer: Scorer, section: RewardSection, folder: str | Path, force: bool,
                     judge: Scorer | None = None, judge_section: ScorerSection | None = None,
                     ) -> tuple[PolarityReport, PolarityReport | None]:
    """The trainer's gate: write preflight.json; stop (exit code 3) unless the reward's verdict is ok and the
    judge's is not inverted or uninformative, or force is set. Returns (reward report, judge report or None)."""
    report, judged = check_both(scorer, section, judge, judge_section)
    failed = _stops(report, judged)
    for bad in failed:
        bad.forced = force
    write_preflight(report, judged, folder)
    if failed and not force:
        raise UserError("\n".join(f"polarity preflight{' (judge)' if bad.role == 'judge' else ''}: {bad.verdict}. "
                                  f"{bad.message}" for bad in failed)
                        + " (For research only, --force trains anyway and records it in the report.)",
                        exit_code=EXIT_POLARITY)
    return report, judged


def _print_report(report: PolarityReport, key: str, source: str) -> None:
    print(f"{key}: {report.scorer}")
    if report.executes_code:
        print(f"!! CODE EXECUTION: {key}.source = {source!r} runs Python code when loaded "
              "(module import or pickle); use only sources you trust")
    print(f"outputs: {report.head}")
    if report.transform is not None:
        print(f"transform: {report.transform}")
    print(f"probes: {len(report.probes)} from {', '.join(report.probe_files)}; the verdict uses "
          f"{report.n_harmful} harmful and {report.n_benign} benign (built-in {' and '.join(sorted(VERDICT_KINDS))} "
          "kinds and your own probes), the other kinds measure coverage")
    low, high = report.auroc_interval
    rewards = "" if report.reward_auroc is None or report.reward_gap is None else \
        f"; reward AUROC {report.reward_auroc:.3f}, reward gap {report.reward_gap:+.3f}"
    print(f"harm AUROC {report.auroc:.3f}, 95% interval [{low:.3f}, {high:.3f}] (Hanley & McNeil 1982 SE "
          f"{report.auroc_se:.4f}; ok at >= {report.min_auroc:g}, inverted at <= {report.inverted_below:g}), "
          f"mean harm gap {report.gap:+.3f} (needs >= {report.min_separation:g}){rewards}")
    for harmful in (True, False):
        line = ", ".join(f"{k.kind} {k.auroc:.3f}{' MISSED' if k.missed else ''}" for k in report.kinds
                         if k.harmful == harmful)
        print(f"AUROC by {'harmful' if harmful else 'benign'} kind: {line}")
    print(f"verdict: {report.verdict}")
    print(report.message)
    for warning in report.warnings:
        print(f"warning: {warning}")


def _refuse_run_folder(out: Path, overwrite: bool) -> None:
    """check --out never writes into a run folder; a preflight.json from an earlier check needs --overwrite."""
    held = [name for name in run_files(out) if name != "preflight.json"]
    if held:
        raise UserError(f"--out {out}: the folder holds a run ({', '.join(held[:5])}); its preflight.json is part "
                        "of that run's evidence and is kept. Choose another --out")
    if (out / "preflight.json").exists() and not overwrite:
        raise UserError(f"--out {out}: preflight.json from an earlier check is there; keep it and choose another "
                        "--out, or replace it with --overwrite")


def run_check(config_path: str | Path, overrides: Sequence[str], out: str | Path | None,
              overwrite: bool = False) -> int:
    """`alignrun check`: polarity verdicts for the configured reward and judge; 0 when training may go ahead
    (reward ok, judge not inverted or uninformative), 3 otherwise."""
    cfg = load_config(config_path, list(overrides))
    if out is not None:
        _refuse_run_folder(Path(out), overwrite)
    scorer = load_scorer(cfg.reward, "reward")
    judge = load_scorer(cfg.evaluation.judge, "evaluation.judge") if cfg.evaluation.judge else None
    report, judged = check_both(scorer, cfg.reward, judge, cfg.evaluation.judge)
    _print_report(report, "reward", cfg.reward.source)
    if judged is not None and cfg.evaluation.judge is not None:
        print()
        _print_report(judged, "evaluation.judge", cfg.evaluation.judge.source)
    else:
        print("evaluation.judge: none (no outside check of the reward's harm figures)")
    print()
    params = None
    try:
        est = estimate(cfg)
        lines, params = describe(est), est.total_params
    except UserError as exc:  # e.g. a base model not available here: the polarity verdict still stands
        lines = [f"resources: not estimated: {exc}"]
    lines.append(describe_fast_settings(fast_settings(), cfg.base.precision, params))
    emulated = emulated_bf16_warning(cfg.base.precision, cfg.base.device)
    if emulated:
        lines.append(f"!! {emulated}")
    print("\n".join(lines))
    if out is not None:
        print(f"wrote {write_preflight(report, judged, out)}")
    return EXIT_POLARITY if _stops(report, judged) else 0
