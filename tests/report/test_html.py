"""report.html: self-contained (data-URI images, inline style, no script, no external address),
built from the run's data with every text escaped; report.md embeds the same figures."""

import base64
import dataclasses
import json
import re
from html.parser import HTMLParser

import pytest

from pairvel.core.warnlog import RunWarning
from pairvel.report.blinding import load_result
from pairvel.report.figures import format_tau
from pairvel.report.html import render_html
from pairvel.report.outputs import summary_dict, write_outputs


class Elements(HTMLParser):
    """Tags with their attributes, and the page's text."""

    def __init__(self):
        super().__init__()
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(text):
    page = Elements()
    page.feed(text)
    return page


def test_html_report_is_self_contained(tiny_run):
    html = (tiny_run / "report.html").read_text(encoding="utf-8")
    page = parse(html)
    summary = json.loads((tiny_run / "summary.json").read_text())
    tags = [t for t, _ in page.tags]
    assert "script" not in tags and "link" not in tags and "iframe" not in tags
    addresses = [v for _, attrs in page.tags for k, v in attrs.items() if k in ("src", "href", "action")]
    assert addresses and all(v.startswith("data:image/png;base64,") for v in addresses)
    bare = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", html)
    assert "://" not in bare and "url(" not in bare and "@import" not in bare   # nothing to fetch from anywhere
    # every figure written is embedded, byte for byte
    embedded = {base64.b64decode(v.split(",", 1)[1]) for v in addresses}
    pngs = {p.read_bytes() for p in tiny_run.glob("*.png")}
    assert embedded == pngs and len(pngs) >= 3
    assert {p.stem for p in tiny_run.glob("*.pdf")} == {p.stem for p in tiny_run.glob("*.png")}
    text = " ".join(page.text)
    assert "pairvel report: tiny" in text and format_tau(summary["tau_mean"], summary["tau_mean_error"]) in text
    # the stated assumptions (summary["assumptions"]) head the page, every label of them
    for label in summary["assumptions"]:
        assert label in text, label
    assert "bias b" in text and "Omega_m" in text
    # provenance: the config text as read, its checksum, the (absent) git commit
    assert "[catalogue]" in text and summary["provenance"]["config_sha256"] in text
    assert "config_git_commit" in summary["provenance"] and summary["provenance"]["config_git_commit"] is None


def test_report_md_embeds_every_png(tiny_run):
    report = (tiny_run / "report.md").read_text()
    linked = set(re.findall(r"!\[[^]]*\]\(([^)]+)\)", report))
    assert linked == {p.name for p in tiny_run.glob("*.png")}
    assert "|  |" not in report and "| |" not in report                       # no blank table columns


def test_text_is_escaped_and_assumptions_rendered_generically(tiny_run, tmp_path):
    result = load_result(tiny_run)
    hostile = "<img src=x onerror=alert(1)> & <script>"
    result = dataclasses.replace(result, warnings=(RunWarning(text=hostile, source="<b>src</b>", stage="photometry"),))
    summary = summary_dict(result)
    summary["assumptions"] = {"tracer bias b": 2.5, "cosmology": "flat <LCDM>", "fit range [Mpc]": [20.0, 120.0]}
    html = render_html(result, summary, [], tmp_path)
    assert hostile not in html and "&lt;img src=x onerror=alert(1)&gt; &amp; &lt;script&gt;" in html
    assert "<b>src</b>" not in html and "<script" not in html
    text = " ".join(parse(html).text)
    assert "tracer bias b 2.5" in " ".join(text.split()) and "flat <LCDM>" in text and "[20, 120]" in text
    assert "theory.bias" not in text                                          # the stated dict replaces the fallback


def test_a_null_pte_too_high_is_flagged_in_both_reports(tiny_run, tmp_path):
    result = load_result(tiny_run)
    high = dataclasses.replace(result.nulls[0], pte_mean=0.997)
    out = write_outputs(dataclasses.replace(result, nulls=(high, *result.nulls[1:])), tmp_path / "out")
    rows = re.findall(r'<tr class="flag-(\w+)">(.*?)</tr>', (out / "report.html").read_text(), flags=re.S)
    assert [flag for flag, _ in rows] == ["high"] and high.kind in rows[0][1] and "HIGH" in rows[0][1]
    md = [line for line in (out / "report.md").read_text().splitlines() if line.startswith(f"| {high.description}")]
    assert md and "| HIGH | FAIL (PTE high) |" in md[0]  # a PTE above 0.99 fails like one below 0.01
    summary = json.loads((out / "summary.json").read_text())
    assert summary["null_tests"][0]["verdict"] == "FAIL (PTE high)" and summary["null_tests_passed"] is False
    from pairvel.cli import _closing_summary

    closing = _closing_summary(dataclasses.replace(result, nulls=(high, *result.nulls[1:])), out)
    assert f"null {high.kind}" in closing and "(PTE 1: HIGH, above 0.99): FAIL (PTE high)" in closing


def test_empirical_significance_reaches_every_report(tiny_run, tmp_path):
    """The amplitudes fitted to the null realisations: summary.json, report.md, report.html and the closing line."""
    from pairvel.cli import _closing_summary

    result = load_result(tiny_run)
    entries = result.extra["empirical_significance"]
    assert entries and all(e["n"] == len(e["amplitudes"]) for e in entries)
    out = write_outputs(result, tmp_path / "out")
    assert json.loads((out / "summary.json").read_text())["empirical_significance"] == entries
    assert "## Empirical significance" in (out / "report.md").read_text()
    assert "Empirical significance" in (out / "report.html").read_text()
    assert "  empirical: tau_mean exceeded by" in _closing_summary(result, out)


def test_tracer_diagnostics_reach_both_reports(tiny_run, tmp_path):
    from test_figures import synthetic_tracers

    result = load_result(tiny_run)
    tracers = synthetic_tracers()
    if "tracers" in {f.name for f in dataclasses.fields(result)}:
        result = dataclasses.replace(result, tracers=tracers)
    else:  # before the per-tracer table is a RunResult field
        object.__setattr__(result, "tracers", tracers)
    out = write_outputs(result, tmp_path / "out")
    html = (out / "report.html").read_text()
    report = (out / "report.md").read_text()
    for stem in ("footprint", "redshifts", "temperature_vs_z", "temperatures"):
        assert (out / f"{stem}.pdf").is_file() and f'id="fig-{stem}"' in html and f"]({stem}.png)" in report


@pytest.mark.parametrize("blinded", [True, False])
def test_blinding_banner(tiny_run, tmp_path, blinded):
    result = load_result(tiny_run)
    result = dataclasses.replace(result, extra={**result.extra, "blinding": {"blinded": blinded}})
    html = render_html(result, summary_dict(result), [], tmp_path)
    assert ("BLINDED: the curve" in html) is blinded and ("Not blinded." in html) is not blinded
