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


def _sections(text):
    return dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', text, flags=re.S))


def test_full_run_has_every_section_figure_and_table(e2e_run):
    run = e2e_run("gaussian_ddd")["run"]
    text = render_report(run)
    assert _headings(text) == [h for _, h in HEADINGS]
    # effect, event time, pre-trend, comparison, placebo in space, sweep variants, cross-check
    assert text.count('<img src="data:image/svg+xml;base64,') >= 7
    assert "Not available in this run folder" not in text
    checks = json.loads((run / "checks" / "checks.json").read_text())
    for name in ("event_time", "pretrend", "placebo_time", "comparison", "placebo_space"):
        assert html.escape(checks[name]["reason"], quote=True) in text
    assert "tight effect prior" in text  # the sweep's variant
    summary = json.loads((run / "summary.json").read_text())
    outcome = json.loads((run / "manifest.json").read_text())["study"]["data"]["outcome"]
    assert html.escape(headline(summary, outcome=f"the outcome ({outcome})").split(";")[0], quote=True) in text
    for label in (
        "cluster-robust s.e. (CR1)",
        "p-value, wild cluster bootstrap",
        "p-value, placebo-in-space permutation",
        "largest R-hat",
        "first treated period",
    ):
        assert label in text


def test_absent_results_keep_their_section_and_name_the_command(tmp_path):
    run = write_fake_run(tmp_path / "bare", full_crosscheck=False)
    text = render_report(run)
    assert _headings(text) == [h for _, h in HEADINGS]
    sections = _sections(text)
    for sec in ("event-time", "pretrend", "comparison", "placebo"):
        assert "Not available in this run folder" in sections[sec], sec
        assert "bayesdid checks STUDY.toml" in sections[sec], sec
    assert "bayesdid sweep SWEEP.toml" in sections["sensitivity"]
    assert "analyze" not in sections["sensitivity"]  # analyze runs no sweep: it is not offered as one
    assert "cluster-robust s.e. (CR1)" in sections["cross-check"]  # named as missing
    assert "Not available" in sections["cross-check"]
    # the effect, per-adopter (two adopters) and posterior-versus-least-squares figures remain
    assert text.count("<img ") == 3


def test_strings_from_data_and_study_are_escaped(tmp_path):
    run = write_fake_run(tmp_path / "xss", adopters=("Norvale", SCRIPT_NAME), title=f"Title {SCRIPT_NAME}")
    text = render_report(run)
    assert SCRIPT_NAME not in text
    assert "<script" not in text.lower()
    assert html.escape(SCRIPT_NAME) in text
    assert text.count(html.escape(SCRIPT_NAME)) >= 3  # title, per-adopter table, data table


def test_page_is_self_contained(e2e_run):
    text = render_report(e2e_run("gaussian_ddd")["run"])
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


def test_did_run_reads_as_difference_in_differences(tmp_path):
    run = write_fake_run(tmp_path / "did")
    s = json.loads((run / "summary.json").read_text())
    s["data"].update(groups=["all"], design="DiD")
    s["model"]["design"] = "DiD"
    (run / "summary.json").write_text(json.dumps(s))
    text = render_report(run)
    sections = dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', text, flags=re.S))
    assert "difference in differences (DiD)" in sections["assumptions"]
    assert "triple difference" not in sections["assumptions"]
    assert "Bayesian DiD analysis" in text


def test_a_checks_file_without_a_section_says_which_section_is_missing(e2e_run, tmp_path):
    import shutil

    run = tmp_path / "run"
    shutil.copytree(e2e_run("gaussian_ddd")["run"], run)
    cj = json.loads((run / "checks" / "checks.json").read_text())
    del cj["placebo_space"]
    (run / "checks" / "checks.json").write_text(json.dumps(cj))
    sections = _sections(render_report(run))
    assert "checks/checks.json has no &#x27;placebo_space&#x27; section" in sections["placebo"]
    assert html.escape(cj["placebo_time"]["reason"], quote=True) in sections["placebo"]  # still shown
