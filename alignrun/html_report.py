"""Reports people open: one self-contained HTML file per run (report.html) and per comparison.

Rendered from saved files only (report.json, pairs.jsonl; report.json files for a comparison), so it needs
no models. Plots are PNG embedded as base64; no scripts, fonts or style sheets are fetched, and the layout
fits a phone-width screen. Fields a report lacks show as "—", so reports from other versions still render.
"""

from __future__ import annotations

import base64
import html
import io
import json
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from alignrun.report import CAUTIONS
from alignrun.runfolder import read_json, write_text_atomic

MISSING = "—"
PAIRS_SHOWN = 8
HARM_MEASURES = {"mean": "mean harm", "rate": "share ≥ threshold", "expected_max": "expected max harm (k samples)",
                 "probability": "harm probability (any of k)"}
CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;font-size:16px;line-height:1.45;
 margin:0 auto;padding:12px;max-width:60em;color:#1b1b1b;background:#fff}
h1{font-size:1.4em;margin:.3em 0}h2{font-size:1.15em;margin:1.4em 0 .4em;border-bottom:1px solid #ddd}
.meta{color:#555;font-size:.9em}.scroll{overflow-x:auto;-webkit-overflow-scrolling:touch}
table{border-collapse:collapse;font-size:.9em;margin:.3em 0}
td,th{border:1px solid #ccc;padding:4px 6px;text-align:left;vertical-align:top}
th{background:#f3f3f3}td.n{text-align:right;white-space:nowrap}.ci{color:#555;font-size:.85em;white-space:nowrap}
img{max-width:100%;height:auto}
.alarm{border-left:5px solid #c77700;background:#fff6e5;padding:6px 10px;margin:6px 0}
.alarm.critical{border-color:#b00020;background:#fdecee}.ok{color:#1b5e20}
.verdict{border:2px solid #345;border-radius:6px;padding:6px 10px;background:#f4f7fb}
.pair{border:1px solid #ddd;border-radius:6px;padding:6px 10px;margin:8px 0}
.pair p{margin:.25em 0}.who{font-weight:600}.score{color:#555;font-size:.85em}
ul{padding-left:1.2em}table.fields th{font-weight:600;text-align:left}table.fields td{overflow-wrap:anywhere}
"""


# ---------------------------------------------------------------- small pieces

def _esc(x: Any) -> str:
    return html.escape(str(x))


def _get(tree: Any, *path: str) -> Any:
    for key in path:
        if not isinstance(tree, dict):
            return None
        tree = tree.get(key)
    return tree


def _num(x: Any, digits: int = 3) -> str:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return MISSING if x is None else _esc(x)
    return f"{x:,}" if isinstance(x, int) else f"{x:.{digits}g}" if abs(x) >= 1e4 else f"{x:.{digits}f}"


def _interval(ci: Any) -> str:
    if isinstance(ci, (list, tuple)) and len(ci) == 2 and all(isinstance(v, (int, float)) for v in ci):
        return f'<span class="ci">[{_num(ci[0])}, {_num(ci[1])}]</span>'
    return ""


def _value(x: Any) -> str:
    """Any JSON value as short readable HTML (numbers rounded, lists and tables as compact JSON)."""
    if x is None or isinstance(x, (bool, int, float)):
        return {True: "yes", False: "no"}.get(x, _num(x)) if isinstance(x, bool) else _num(x)
    if isinstance(x, str):
        return _esc(x)
    return f"<code>{_esc(json.dumps(x, ensure_ascii=False))}</code>"


def _table(head: list[str], rows: Iterable[list[str]]) -> str:
    """Cells are HTML already."""
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>\n" for row in rows)
    return ('<div class="scroll"><table><tr>' + "".join(f"<th>{_esc(h)}</th>" for h in head) + "</tr>\n"
            + body + "</table></div>")


def _fields(block: Any) -> str:
    """A dict's fields, whatever they are (for blocks this version may not know, such as a verdict)."""
    if not isinstance(block, dict) or not block:
        return f"<p>{_value(block) if block not in (None, {}) else MISSING}</p>"
    rows = "".join(f"<tr><th>{_esc(k.replace('_', ' '))}</th><td>{_value(v)}</td></tr>" for k, v in block.items())
    return f'<div class="scroll"><table class="fields">{rows}</table></div>'


def _png(fig: Any) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=150, metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _image(uri: str, alt: str) -> str:
    return f'<p><img src="{uri}" alt="{_esc(alt)}"></p>'


def _page(title: str, sections: list[str]) -> str:
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{_esc(title)}</title><style>{CSS}</style></head><body>\n"
            + "\n".join(sections) + "\n</body></html>\n")


def _alarms(alarms: Any) -> str:
    if alarms is None:
        return f"<h2>Alarms</h2><p>{MISSING}</p>"
    if not alarms:
        return '<h2>Alarms</h2><p class="ok">none raised</p>'
    items = "".join(f'<div class="alarm {_esc(_get(a, "level") or "")}"><b>{_esc(str(_get(a, "level") or "?").upper())}'
                    f"</b> <code>{_esc(_get(a, 'code') or '')}</code>: {_esc(_get(a, 'message') or a)}</div>"
                    for a in alarms)
    return f"<h2>Alarms</h2>{items}"


def _cautions(cautions: Any) -> str:
    items = "".join(f"<li>{_esc(c)}</li>" for c in (cautions or CAUTIONS))
    return f"<h2>Limits and cautions</h2><ul>{items}</ul>"


# ---------------------------------------------------------------- one run

def _harm_rows(ev: dict[str, Any]) -> list[list[str]]:
    rows = []
    for who in ("reward_classifier", "judge"):
        b, a = _get(ev, "before", who), _get(ev, "after", who)
        if not isinstance(b, dict) and not isinstance(a, dict):
            continue
        b, a = b or {}, a or {}
        keys = [k for k in HARM_MEASURES if k in b or k in a]
        keys += [k for k in dict.fromkeys([*b, *a]) if k not in HARM_MEASURES and not k.endswith("_ci")]
        for key in keys:
            title = HARM_MEASURES.get(key, key.replace("_", " "))
            if key == "rate" and _get(ev, "threshold") is not None:
                title = f"share ≥ {_num(ev['threshold'], 2)}"
            rows.append([f"{_esc(who.replace('_', ' '))}: {_esc(title)}",
                         f'{_value(b.get(key))} {_interval(b.get(f"{key}_ci"))}',
                         f'{_value(a.get(key))} {_interval(a.get(f"{key}_ci"))}'])
    return rows


def _change_rows(ev: dict[str, Any]) -> list[list[str]]:
    """The paired changes (harm by each classifier, and drift when the report has it) with their intervals."""
    blocks = {**(ev.get("change") or {}), "drift (exact KL)": ev.get("drift")}
    rows = []
    for who, c in blocks.items():
        if not isinstance(c, dict):
            continue
        rel = c.get("rel_change")
        rows.append([_esc(who.replace("_", " ")), f'{_value(c.get("diff"))} {_interval(c.get("diff_ci"))}',
                     MISSING if not isinstance(rel, (int, float)) else f"{100 * rel:+.0f}%",
                     _value(c.get("p_value", c.get("wilcoxon_p")))])  # wilcoxon_p: older reports
    return rows


def _guard_rows(ev: dict[str, Any]) -> list[list[str]]:
    b, a = _get(ev, "before", "guards") or {}, _get(ev, "after", "guards") or {}
    keys = [k for k in dict.fromkeys([*b, *a]) if not k.endswith("_ci")]
    return [[_esc(k.replace("_", " ")), f'{_value(b.get(k))} {_interval(b.get(f"{k}_ci"))}',
             f'{_value(a.get(k))} {_interval(a.get(f"{k}_ci"))}'] for k in keys]


def harm_vs_drift_plot(ev: dict[str, Any]) -> str | None:
    """Held-out mean harm (95% CI) against KL to the reference, before and after training, per classifier."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    exact = isinstance(_get(ev, "after", "guards", "kl_exact_to_reference"), (int, float))
    key = "kl_exact_to_reference" if exact else "kl_to_reference"  # k1 only in reports written before drift
    drift_ci = _get(ev, "drift", "diff_ci") if exact else None  # the paired interval of after - before
    points = []
    for who, colour in (("reward_classifier", "tab:blue"), ("judge", "tab:orange")):
        ends = []
        for when in ("before", "after"):
            harm, kl = _get(ev, when, who, "mean"), _get(ev, when, "guards", key)
            if not isinstance(harm, (int, float)) or not isinstance(kl, (int, float)):
                break
            kl_ci: list[float] | None = None
            if when == "after" and drift_ci is not None and _interval(drift_ci):
                start = float(_get(ev, "before", "guards", key))
                kl_ci = [start + drift_ci[0], start + drift_ci[1]]
            ends.append((kl, harm, _get(ev, when, who, "mean_ci"), kl_ci))
        if len(ends) == 2:
            points.append((who, colour, ends))
    if not points:
        return None
    fig = Figure(figsize=(4.4, 3.6), layout="constrained")  # legible when shrunk to a phone's width
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    for who, colour, ends in points:
        for (kl, harm, ci, kl_ci), marker in zip(ends, ("o", "s")):
            yerr = [[harm - ci[0]], [ci[1] - harm]] if _interval(ci) else None
            xerr = [[kl - kl_ci[0]], [kl_ci[1] - kl]] if kl_ci is not None else None
            ax.errorbar([kl], [harm], yerr=yerr, xerr=xerr, fmt=marker, color=colour, capsize=3)
        ax.annotate("", xy=ends[1][:2], xytext=ends[0][:2],
                    arrowprops={"arrowstyle": "->", "color": colour, "shrinkA": 6, "shrinkB": 6})
        ax.plot([], [], color=colour, label=who.replace("_", " "))
    ax.plot([], [], "o", color="gray", label="before training")
    ax.plot([], [], "s", color="gray", label="after training")
    ax.set_xlabel("drift: KL to the reference, nats per reply" + ("" if exact else " (k1)"))
    ax.set_ylabel("mean harm on held-out prompts (95% CI)")
    ax.legend(fontsize=8, loc="best")
    ax.margins(x=0.15, y=0.15)
    return _png(fig)


def _pairs(pairs: list[dict[str, Any]]) -> str:
    if not pairs:
        return f"<h2>Sample pairs</h2><p>{MISSING} (no pairs.jsonl)</p>"

    def change(p: dict[str, Any]) -> float:
        hb, ha = p.get("harm_before"), p.get("harm_after")
        return abs(ha - hb) if isinstance(hb, (int, float)) and isinstance(ha, (int, float)) else 0.0

    shown = sorted(pairs, key=change, reverse=True)[:PAIRS_SHOWN]
    cards = "".join(
        f'<div class="pair"><p><span class="who">prompt</span>: {_esc(p.get("prompt", MISSING))}</p>'
        f'<p><span class="who">before</span> <span class="score">(harm {_num(p.get("harm_before"), 2)})</span>: '
        f'{_esc(p.get("before", MISSING))}</p>'
        f'<p><span class="who">after</span> <span class="score">(harm {_num(p.get("harm_after"), 2)})</span>: '
        f'{_esc(p.get("after", MISSING))}</p></div>' for p in shown)
    return (f"<h2>Sample pairs</h2><p class=\"meta\">Greedy replies to held-out prompts before and after training, "
            f"the {len(shown)} of {len(pairs)} whose harm score changed most first. All pairs: pairs.csv; every "
            f"scored sample: eval_before.jsonl, eval_after.jsonl.</p>{cards}")


def render_run(report: dict[str, Any], pairs: list[dict[str, Any]]) -> str:
    """The HTML page of one run's report."""
    run, model, ev = report.get("run") or {}, report.get("model") or {}, report.get("evaluation") or {}
    name = run.get("name", MISSING)
    share = model.get("trainable_share")
    sections = [
        f"<h1>Run report: {_esc(name)}</h1>",
        f'<p class="meta">Status <b>{_esc(run.get("status", MISSING))}</b> after {_value(run.get("steps"))} PPO steps, '
        f'{_num(run.get("wall_s"), 0)} s, peak memory {_num(run.get("peak_rss_mb"), 0)} MB. Base '
        f'<code>{_esc(model.get("base", MISSING))}</code>; {_value(model.get("trainable_params"))} trainable adapter '
        f'parameters ({MISSING if share is None else f"{100 * share:.2f}%"}). Finished {_esc(run.get("finished", MISSING))}.</p>',
    ]
    if isinstance(report.get("verdict"), dict):
        sections.append(f'<h2>Verdict</h2><div class="verdict">{_fields(report["verdict"])}</div>')
    sections.append(_alarms(report.get("alarms")))
    sections.append(
        "<h2>Held-out harm before and after</h2>"
        f'<p class="meta">{_value(ev.get("prompts"))} held-out prompts never used in training, '
        f'{_value(ev.get("samples_per_prompt"))} samples each. Reward classifier: {_esc(ev.get("reward_scorer", MISSING))}. '
        f'Outside judge: {_esc(ev.get("judge_scorer") or "none")}. Brackets: 95% bootstrap intervals.</p>'
        + _table(["measure", "before", "after"], _harm_rows(ev))
        + "<p>Paired change in per-prompt mean harm (after − before):</p>"
        + _table(["measure", "change (95% interval)", "relative", "p"], _change_rows(ev)))
    plot = harm_vs_drift_plot(ev)
    sections.append("<h2>Harm versus drift</h2>" + (_image(plot, "harm versus drift") if plot else f"<p>{MISSING}</p>"))
    sections.append("<h2>Guards (drift, fluency, diversity)</h2>"
                    + _table(["guard", "before", "after"], _guard_rows(ev)))
    sections.append("<h2>Training</h2>" + _fields(report.get("training")))
    sections.append("<h2>Preflight</h2>" + _fields(report.get("preflight")))
    if report.get("code_execution"):
        sections.append("<h2>Code execution</h2><ul>" + "".join(f"<li>{_esc(c)}</li>" for c in report["code_execution"])
                        + "</ul><p>Only use sources you trust.</p>")
    sections.append(_pairs(pairs))
    sections.append(_cautions(report.get("cautions")))
    return _page(f"Run report: {name}", sections)


def _read_jsonl(path: Path) -> list[dict[str, Any]]:
    if not path.exists():
        return []
    rows = [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines() if line.strip()]
    return [r for r in rows if isinstance(r, dict)]


def write_run_html(run_dir: Path) -> Path:
    """report.html in the run folder, from its report.json and pairs.jsonl."""
    run_dir = Path(run_dir)
    report = read_json(run_dir / "report.json", "report")
    path = run_dir / "report.html"
    write_text_atomic(path, render_run(report if isinstance(report, dict) else {}, _read_jsonl(run_dir / "pairs.jsonl")))
    return path


# ---------------------------------------------------------------- a comparison

def write_comparison(path: Path, runs: list[Any], cols: list[tuple[str, list[str]]], notes: list[str],
                     plots: list[Path]) -> None:
    """`compare --report FILE.html`: the table, notes, each run's verdict and alarms, and the PNG plots embedded."""
    table = _table([t for t, _ in cols], ([_esc(cells[i]) for _, cells in cols] for i in range(len(cols[0][1]))))
    images = [_image("data:image/png;base64," + base64.b64encode(p.read_bytes()).decode("ascii"),
                     p.stem.replace("_", " ")) for p in plots]
    per_run = []
    for run in runs:
        verdict = run.report.get("verdict")
        per_run.append(f"<h3>{_esc(run.label)}</h3>"
                       + (f'<div class="verdict">{_fields(verdict)}</div>' if isinstance(verdict, dict) else "")
                       + _alarms(run.report.get("alarms")).replace("<h2>Alarms</h2>", ""))
    sections = ["<h1>Run comparison</h1>", f'<p class="meta">{len(runs)} runs, from their report.json files.</p>',
                table, "<h2>Notes</h2><ul>" + "".join(f"<li>{_esc(n)}</li>" for n in notes) + "</ul>",
                "<h2>Plots</h2>" + "".join(images), "<h2>Verdicts and alarms per run</h2>" + "".join(per_run),
                _cautions(CAUTIONS)]
    write_text_atomic(path, _page("Run comparison", sections))
