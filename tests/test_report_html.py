"""The HTML report as text: every section present, absent results said plainly, escaping, errors."""

from __future__ import annotations

import html
import json
import re

import pytest
from report_fixtures import SCRIPT_NAME, write_fake_run

from bayesdid.cli import main
from bayesdid.errors import ReportError
from bayesdid.report import HEADINGS, headline, render_report, write_report


def _headings(text):
    return [html.unescape(h) for h in re.findall(r"<h2>(.*?)</h2>", text)]


def test_full_run_has_every_section_figure_and_table(tmp_path):
    run = write_fake_run(tmp_path / "run")
    text = render_report(run)
    assert _headings(text) == [h for _, h in HEADINGS]
    # effect, event time, pre-trend, comparison, sensitivity variants, cross-check
    assert text.count('<img src="data:image/svg+xml;base64,') == 6
    assert "Not available in this run folder" not in text
    assert "leads are near zero" in text and "one comparison jurisdiction moves" in text
    assert "needs at least 5 comparison jurisdictions" in text  # a 'not applicable' check shows its reason
    assert "the sign of the effect holds in every variant" in text
    summary = json.loads((run / "summary.json").read_text())
    assert html.escape(headline(summary, outcome="the outcome (oop_spend)")) in text
    for label in ("cluster-robust s.e. (CR1)", "p-value, wild cluster bootstrap",
                  "p-value, placebo-in-space permutation", "largest R-hat", "first treated period"):
        assert label in text


def test_absent_results_keep_their_section_and_name_the_command(tmp_path):
    run = write_fake_run(tmp_path / "bare", checks=False, sweep=False, full_crosscheck=False)
    text = render_report(run)
    assert _headings(text) == [h for _, h in HEADINGS]
    sections = dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', text, flags=re.S))
    for sec in ("event-time", "pretrend", "comparison", "placebo"):
        assert "Not available in this run folder" in sections[sec], sec
        assert "bayesdid checks STUDY.toml" in sections[sec], sec
    assert "bayesdid sweep SWEEP.toml" in sections["sensitivity"]
    assert "cluster-robust s.e. (CR1)" in sections["cross-check"]  # named as missing
    assert "Not available" in sections["cross-check"]
    assert text.count("<img ") == 2  # the effect and the posterior-versus-least-squares figures remain


def test_strings_from_data_and_study_are_escaped(tmp_path):
    run = write_fake_run(tmp_path / "xss", adopters=("Norvale", SCRIPT_NAME),
                         comparisons=("Ambermoor", "Brackwater", SCRIPT_NAME), title=f"Title {SCRIPT_NAME}")
    text = render_report(run)
    assert SCRIPT_NAME not in text
    assert "<script" not in text.lower()
    assert html.escape(SCRIPT_NAME) in text
    assert text.count(html.escape(SCRIPT_NAME)) >= 4  # title, headline, tables, flagged list


def test_page_is_self_contained(tmp_path):
    text = render_report(write_fake_run(tmp_path / "run"))
    assert "Content-Security-Policy" in text and "default-src 'none'" in text
    assert not re.search(r'(src|href)\s*=\s*"(?!data:|#)', text)  # only inline images and in-page links
    assert "@import" not in text and "url(" not in text


def test_report_writes_only_report_html(tmp_path):
    run = write_fake_run(tmp_path / "run")
    before = sorted(p.relative_to(run) for p in run.rglob("*"))
    path = write_report(run)
    after = sorted(p.relative_to(run) for p in run.rglob("*"))
    assert path == run / "report.html"
    assert sorted(set(after) - set(before)) == [path.relative_to(run)]
    assert path.stat().st_mode & 0o044  # readable by others, like the other run files


def test_missing_or_broken_run_folder_is_a_clear_error_and_writes_nothing(tmp_path):
    with pytest.raises(ReportError, match=r"run folder '.*nowhere' does not exist; create it with `bayesdid fit"):
        write_report(tmp_path / "nowhere")
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(ReportError, match="has no summary.json; it is not the output of a fit"):
        write_report(empty)
    (empty / "summary.json").write_text("{not json")
    with pytest.raises(ReportError, match="is not valid JSON"):
        write_report(empty)
    (empty / "summary.json").write_text(json.dumps({"effect": {}, "data": {}}))
    with pytest.raises(ReportError, match="lacks the 'diagnostics' entry"):
        write_report(empty)
    assert sorted(p.name for p in empty.iterdir()) == ["summary.json"]


def test_cli_report_exit_codes(tmp_path, capsys):
    assert main(["report", str(tmp_path / "missing")]) == 2
    assert "does not exist" in capsys.readouterr().err
    run = write_fake_run(tmp_path / "run")
    assert main(["report", str(run)]) == 0
    assert f"report in {run / 'report.html'}" in capsys.readouterr().out
    assert (run / "report.html").is_file()


def test_a_broken_checks_table_is_reported_not_fatal(tmp_path):
    run = write_fake_run(tmp_path / "run")
    (run / "checks" / "event_time.csv").write_text("k,estimate\n-1,0\n")  # no interval columns
    text = render_report(run)
    sections = dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', text, flags=re.S))
    assert "the event-time table (checks/event_time.csv" in sections["event-time"]
    assert "leads are near zero" in sections["event-time"]  # the status from checks.json still shows


def test_did_run_reads_as_difference_in_differences(tmp_path):
    run = write_fake_run(tmp_path / "did", checks=False, sweep=False)
    s = json.loads((run / "summary.json").read_text())
    s["data"].update(groups=["all"], design="DiD")
    s["model"]["design"] = "DiD"
    (run / "summary.json").write_text(json.dumps(s))
    text = render_report(run)
    sections = dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', text, flags=re.S))
    assert "difference in differences (DiD)" in sections["assumptions"]
    assert "triple difference" not in sections["assumptions"]
    assert "Bayesian DiD analysis" in text


def test_a_checks_file_without_a_section_says_which_section_is_missing(tmp_path):
    run = write_fake_run(tmp_path / "run", sweep=False)
    cj = json.loads((run / "checks" / "checks.json").read_text())
    del cj["placebo_space"]
    (run / "checks" / "checks.json").write_text(json.dumps(cj))
    sections = dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', render_report(run), flags=re.S))
    assert "checks/checks.json has no &#x27;placebo_space&#x27; section" in sections["placebo"]
    assert "no effect at the fake start" in sections["placebo"]  # the placebo in time is still shown
