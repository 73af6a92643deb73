"""`bayesdid analyze` runs the fit, the optional steps present in this version, and the report."""

from __future__ import annotations

import re
from pathlib import Path

from bayesdid.cli import ANALYZE_STEPS, main

CASE = Path(__file__).resolve().parent.parent / "case_files" / "copay_cap" / "study.toml"


def test_analyze_writes_fit_and_report_and_accounts_for_each_step(tmp_path, capsys):
    out = tmp_path / "run"
    # same model structure as the demo run of the browser test: one compile per test session
    code = main(["analyze", str(CASE), "--out", str(out), "--draws", "300", "--tune", "300", "--quiet"])
    assert code == 0
    cap = capsys.readouterr()
    assert {"summary.json", "posterior.nc", "manifest.json", "report.html"} <= {p.name for p in out.iterdir()}
    assert f"report in {out / 'report.html'}" in cap.out
    for name, _, _ in ANALYZE_STEPS:  # each step either ran or says why the report marks it absent
        assert re.search(rf"{re.escape(name)}: (done|not available|not run)", cap.err), name
    text = (out / "report.html").read_text(encoding="utf-8")
    assert "Valmora copay cap for chronic-condition enrollees" in text


def test_analyze_with_a_bad_study_file_exits_2_and_writes_nothing(tmp_path, capsys):
    bad = tmp_path / "study.toml"
    bad.write_text(CASE.read_text(encoding="utf-8").replace("[model]", "[model]\ncolour = 1"), encoding="utf-8")
    (tmp_path / "enrollees.csv").symlink_to(CASE.parent / "enrollees.csv")
    out = tmp_path / "run"
    assert main(["analyze", str(bad), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "colour" in err
    assert not out.exists()
