"""Output folders: a killed writer leaves nothing the next write does not clean, --replace swaps only
folders bayesdid wrote, and a setting is checked the same way whatever its source."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from bayesdid.errors import OutputError, StudyError
from bayesdid.outputs import atomic_folder, clean_leftovers, is_bayesdid_folder, owner_tag

WRITER = """
import sys, time
from bayesdid.outputs import atomic_folder
with atomic_folder(sys.argv[1]) as tmp:
    (tmp / "posterior.nc").write_bytes(b"half")
    print(tmp, flush=True)
    time.sleep(120)
"""


def test_a_writer_killed_mid_write_leaves_a_partial_folder_the_next_write_removes(tmp_path):
    out = tmp_path / "run"
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(out)], stdout=subprocess.PIPE, text=True)
    try:
        partial = Path(proc.stdout.readline().strip())
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert partial.parent == tmp_path and partial.name.startswith(f".run.partial-{owner_tag(proc.pid)}-")
    assert partial.is_dir() and not out.exists()
    live = tmp_path / f".run.partial-{owner_tag()}-abcd1234"  # a writer that is still running: kept
    live.mkdir()
    with atomic_folder(out) as tmp:
        (tmp / "summary.json").write_text("{}")
    assert not partial.exists() and live.exists()
    assert sorted(p.name for p in out.iterdir()) == ["manifest.json", "summary.json"]
    assert is_bayesdid_folder(out) and json.loads((out / "manifest.json").read_text())["kind"] == "run"


def test_an_earlier_run_swapped_out_by_a_killed_writer_is_put_back(tmp_path):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    hidden = tmp_path / f".run.old-{owner_tag(int(dead.stdout))}"
    hidden.mkdir()
    (hidden / "manifest.json").write_text('{"bayesdid": "0.1.0"}')
    assert clean_leftovers(tmp_path / "run") == [hidden.name]
    assert is_bayesdid_folder(tmp_path / "run") and not hidden.exists()


def test_replace_swaps_a_bayesdid_folder_and_leaves_no_hidden_copy(tmp_path):
    out = tmp_path / "run"
    with atomic_folder(out) as tmp:
        (tmp / "manifest.json").write_text('{"bayesdid": "0.1.0", "n": 1}')
    with pytest.raises(OutputError, match="already exists and is not empty: it holds a bayesdid run folder"):
        atomic_folder(out).check()
    with atomic_folder(out, replace=True) as tmp:
        (tmp / "manifest.json").write_text('{"bayesdid": "0.1.0", "n": 2}')
    assert json.loads((out / "manifest.json").read_text())["n"] == 2
    assert [p.name for p in tmp_path.iterdir()] == ["run"]
    (out / "manifest.json").write_text('{"tool": "another"}')  # a manifest, but not bayesdid's
    with pytest.raises(OutputError, match="never replaced, not even with --replace"):
        atomic_folder(out, replace=True).check()


def test_a_failed_write_leaves_nothing(tmp_path):
    out = tmp_path / "run"
    with pytest.raises(RuntimeError):
        with atomic_folder(out) as tmp:
            (tmp / "a").write_text("x")
            raise RuntimeError("disk full")
    assert list(tmp_path.iterdir()) == []


def test_the_same_check_and_message_from_the_file_the_api_and_the_command_line(tmp_path, capsys):
    """sampler.draws = 0 from a study file, make_study, Study.replace and --draws: one check, one message."""
    from bayesdid.cli import main
    from bayesdid.study import load_study, make_study

    core = "study key 'sampler.draws': expected an integer of at least 10, found 0."
    (tmp_path / "t.csv").write_text("region,period,y\nA,1,1\n")
    kw = dict(table=tmp_path / "t.csv", outcome="y", jurisdiction="region", period="period", adopters={"A": 2})
    study = tmp_path / "s.toml"
    study.write_text(
        '[data]\ntable = "t.csv"\noutcome = "y"\njurisdiction = "region"\nperiod = "period"\n'
        '[policy]\nadopters = { "A" = 2 }\n[sampler]\ndraws = 0\n'
    )
    messages = []
    for make in (
        lambda: load_study(study),
        lambda: make_study(**kw, draws=0),
        lambda: make_study(**kw).replace(sampler={"draws": 0}),
    ):
        with pytest.raises(StudyError) as info:
            make()
        messages.append(str(info.value))
    assert messages == [core] * 3
    study.write_text(study.read_text().replace("draws = 0", "draws = 100"))
    assert main(["fit", str(study), "--out", str(tmp_path / "run"), "--draws", "0"]) == 2
    assert f"command-line option --draws 0: {core}" in capsys.readouterr().err.replace("\n  ", " ")
    # unknown nested keys are named with the allowed list, not a TypeError
    with pytest.raises(StudyError, match=r"unknown key\(s\) \['drws'\] in \[sampler\]"):
        make_study(**kw).replace(sampler={"drws": 5})


def test_atomic_write_replaces_whole_removes_dead_leftovers_and_leaves_nothing_on_failure(tmp_path):
    from bayesdid.outputs import atomic_write

    target = tmp_path / "summary.csv"
    target.write_text("old\n")
    dead = tmp_path / f".summary.csv.partial-{owner_tag(2**22 + 12345)}-zz"  # no such process: a dead writer
    dead.write_text("half")
    live = tmp_path / f".summary.csv.partial-{owner_tag()}-keep"  # this process: a writer still running
    live.write_text("half")
    assert atomic_write(target, "new\n") == target
    assert target.read_text() == "new\n" and (target.stat().st_mode & 0o777) == 0o644
    assert not dead.exists() and live.exists()
    live.unlink()
    atomic_write(target, b"\x00bytes", fsync=True)
    assert target.read_bytes() == b"\x00bytes"
    with pytest.raises(TypeError):
        atomic_write(target, 12345)  # neither text nor bytes: fails while writing the partial file
    assert target.read_bytes() == b"\x00bytes"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["summary.csv"]


def test_one_atomic_writer_renames_files_into_place():
    # Every file put in place by renaming goes through outputs.atomic_write (or atomic_folder); the
    # one other rename moves a finished sweep variant's folder from .staging into variants/.
    import re

    root = Path(__file__).resolve().parent.parent / "bayesdid"
    found = {
        str(p.relative_to(root)): len(re.findall(r"os\.replace\(|\.rename\(", p.read_text(encoding="utf-8")))
        for p in root.rglob("*.py")
    }
    found = {k: v for k, v in found.items() if v}
    assert found == {"outputs.py": 5, "sweep/worker.py": 1}, found
