"""The HTML reports: one self-contained file (no network), built from saved report.json and pairs.jsonl."""

from __future__ import annotations

import base64
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from alignrun import compare, html_report
from alignrun.runfolder import write_json_atomic
from tests.test_compare import PNG_SIGNATURE, make_run

FETCHING_TAGS = {"script", "link", "iframe", "object", "embed", "audio", "video", "source", "base"}


class _Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.refs: list[str] = []  # every src, href, srcset, poster, data and action attribute
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        self.refs += [v or "" for k, v in attrs if k in ("src", "href", "srcset", "poster", "data", "action")]

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def assert_self_contained(page: str) -> _Page:
    """Nothing a browser would fetch: HTML 5 fetches only through these tags and attributes and CSS url()."""
    parsed = _Page()
    parsed.feed(page)
    assert not FETCHING_TAGS & set(parsed.tags), FETCHING_TAGS & set(parsed.tags)
    assert all(ref.startswith(("data:", "#")) for ref in parsed.refs), parsed.refs
    assert not re.search(r"https?://", page, re.IGNORECASE)
    assert not re.search(r"url\(|@import", page)
    return parsed


def embedded_pngs(page: str) -> list[bytes]:
    return [base64.b64decode(m) for m in re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)]


def _run_folder(tmp_path: Path) -> tuple[Path, dict, list[dict]]:
    folder = tmp_path / "run-a"
    folder.mkdir()
    report = make_run(folder, effect=0.4, drift=0.8)
    pairs = [{"prompt": f"Is the <b>Wren</b> frame {i} ready?", "before": f"before reply {i}", "after": f"after reply {i}",
              "harm_before": 0.1 * i, "harm_after": 0.05 * i} for i in range(20)]
    (folder / "pairs.jsonl").write_text("".join(json.dumps(p) + "\n" for p in pairs))
    return folder, report, pairs


def test_run_report_is_self_contained_and_has_every_section(tmp_path: Path) -> None:
    folder, report, pairs = _run_folder(tmp_path)
    page = html_report.write_run_html(folder).read_text(encoding="utf-8")
    parsed = assert_self_contained(page)
    text = " ".join(parsed.text)
    for heading in ("Alarms", "Held-out harm before and after", "Harm versus drift", "Guards", "Sample pairs",
                    "Limits and cautions"):
        assert f"<h2>{heading}" in page, heading
    assert '<meta name="viewport" content="width=device-width' in page  # phone-width layout
    ev = report["evaluation"]
    after = ev["after"]["reward_classifier"]
    assert f"{after['mean']:.3f}" in text and f"[{after['mean_ci'][0]:.3f}, {after['mean_ci'][1]:.3f}]" in text
    change = ev["change"]["reward_classifier"]
    assert f"[{change['diff_ci'][0]:.3f}, {change['diff_ci'][1]:.3f}]" in text
    assert "not a safety guarantee" in text  # alignrun.report.CAUTIONS
    # the pairs whose harm changed most come first, escaped as text
    assert "Is the &lt;b&gt;Wren&lt;/b&gt; frame 19 ready?" in page and "<b>Wren</b>" not in page
    assert page.index("frame 19 ") < page.index("frame 18 ") and "frame 11 " not in page
    (plot,) = embedded_pngs(page)
    assert plot.startswith(PNG_SIGNATURE)  # PNG specification (RFC 2083), section 3.1


def test_missing_fields_show_a_dash_and_a_verdict_block_renders_generically(tmp_path: Path) -> None:
    folder, report, _ = _run_folder(tmp_path)
    report["verdict"] = {"outcome": "harm-lowered", "confidence": 0.91, "reasons": ["judge agrees", "drift small"]}
    del report["training"], report["evaluation"]["after"]["guards"]["kl_to_reference"]
    del report["alarms"], report["evaluation"]["change"]["judge"]["p_value"]
    write_json_atomic(folder / "report.json", report)
    (folder / "pairs.jsonl").unlink()
    page = html_report.write_run_html(folder).read_text(encoding="utf-8")
    assert_self_contained(page)
    verdict = page[page.index("<h2>Verdict"):page.index("<h2>Alarms")]
    assert "harm-lowered" in verdict and "0.910" in verdict and "judge agrees" in verdict
    assert "<h2>Alarms</h2><p>—</p>" in page and "<h2>Training</h2><p>—</p>" in page
    assert "no pairs.jsonl" in page
    assert "<h2>Harm versus drift</h2><p>—</p>" in page  # no KL after training: no plot rather than a wrong one


def test_compare_html_report_embeds_plots_and_each_runs_alarms(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    folders = []
    for name, effect, coef in (("small-step", 0.1, 0.5), ("large-step", 0.3, 0.05)):
        folder = tmp_path / name
        folder.mkdir()
        report = make_run(folder, effect=effect, drift=1.5 * effect, overrides={"kl.coef": coef})
        if name == "large-step":  # an alarm as verdict.alarms writes it
            report["alarms"] = [{"level": "warning", "code": "fluency-drop", "message": "perplexity rose by 40%"}]
            write_json_atomic(folder / "report.json", report)
        folders.append(str(folder))
    out = tmp_path / "cmp.html"
    assert compare.compare_cli(folders, fmt="table", plot_dir=None, report=str(out)) == 0
    page = out.read_text(encoding="utf-8")
    assert_self_contained(page)
    assert "<th>run</th>" in page and "<th>kl.coef</th>" in page and "large-step" in page
    alarms = page[page.index("<h2>Verdicts and alarms per run"):]
    assert alarms.index("small-step") < alarms.index("none raised") < alarms.index("large-step")
    assert "fluency-drop" in alarms and "perplexity rose by 40%" in alarms
    pngs = embedded_pngs(page)
    assert len(pngs) == 2 and all(p.startswith(PNG_SIGNATURE) for p in pngs)  # harm vs KL, before/after bars
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cmp.html", "large-step", "small-step"]  # nothing else
