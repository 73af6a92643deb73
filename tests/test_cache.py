"""The compile cache: a structure compiled by one process is loaded, not compiled, by the next, with the
same draws bit for bit; two processes compiling at once compile once; a damaged entry is rebuilt; a
cache folder that cannot be written still lets the run finish and says why it is slower.

The process tests run ``tests/cache_worker.py`` in fresh interpreters (each pays the imports), in a
cache folder of their own, so that they start from an empty cache whatever the suite's shared cache
holds: two processes at once and a third on a small DiD model (one compile in all), a damaged entry
and an unwritable folder on a two-parameter model (compiles of seconds).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from bayesdid import cachedir, modelcache

WORKER = Path(__file__).with_name("cache_worker.py")


def _start(cache: Path, seed: int = 5, fits: int = 1, small: bool = False) -> subprocess.Popen:
    # Each process test logs its models to a file of its own beside the cache folder (read by the tests).
    env = {**os.environ, cachedir.ENV_VAR: str(cache), modelcache.LOG_ENV: str(_log_of(cache))}
    env.pop("PYTENSOR_FLAGS", None)
    env.pop("NUMBA_CACHE_DIR", None)
    args = [str(seed), str(fits)] + (["small"] if small else [])
    return subprocess.Popen(
        [sys.executable, str(WORKER), *args], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )


def _result(proc: subprocess.Popen) -> dict:
    out, err = proc.communicate(timeout=1800)
    assert proc.returncode == 0, err[-3000:]
    return json.loads(out.strip().splitlines()[-1])


def _log_of(cache: Path) -> Path:
    return cache.parent / f"{cache.name}-compile-log.jsonl"


def _entries(cache: Path) -> list[Path]:
    return sorted((cache / "models").glob("*.model"))


@pytest.fixture(scope="module")
def shared_cache(tmp_path_factory):
    """Two processes started together on an empty cache folder, then a third one after them."""
    cache = tmp_path_factory.mktemp("cache")
    pair = [_result(p) for p in [_start(cache), _start(cache)]]
    third = _result(_start(cache))
    return cache, pair, third


@pytest.mark.slow
def test_two_processes_at_once_compile_once(shared_cache):
    cache, pair, _ = shared_cache
    assert sorted(r["compiles"] for r in pair) == [0, 1]  # the lock made the other one wait, then load
    assert sorted(r["loads"] for r in pair) == [0, 1]
    assert pair[0]["draws"] == pair[1]["draws"]
    assert len(_entries(cache)) == 1
    # The compile log tells the same story: three processes, one compile, two loads of the same key.
    log = modelcache.read_log(_log_of(cache))
    assert sorted(r["how"] for r in log) == ["compiled", "loaded", "loaded"]
    assert len({r["key"] for r in log}) == 1 and len({r["pid"] for r in log}) == 3
    assert {r["key"] for r in log} == {_entries(cache)[0].stem}


@pytest.mark.slow
def test_second_process_compiles_nothing_and_draws_equal(shared_cache):
    _, pair, third = shared_cache
    assert third["compiles"] == 0 and third["loads"] == 1 and third["damaged"] == 0
    assert third["draws"] == pair[0]["draws"]  # bit for bit: a digest of every posterior array


@pytest.mark.slow
def test_damaged_entry_is_rebuilt(tmp_path):
    # What the cache does with a damaged entry does not depend on the model: a two-parameter model
    # (a compile of seconds, where the DiD model of the other process tests takes a minute of CPU).
    cache = tmp_path / "cache"
    first = _result(_start(cache, small=True))
    assert first["compiles"] == 1
    (entry,) = _entries(cache)
    raw = entry.read_bytes()
    entry.write_bytes(raw[: len(raw) // 2])
    r = _result(_start(cache, small=True))
    assert r["damaged"] == 1 and r["compiles"] == 1
    assert r["draws"] == first["draws"]
    assert any("cannot be used" in w and "rebuilt" in w for w in r["cache_warnings"])
    (rebuilt,) = _entries(cache)
    assert rebuilt.name == entry.name and modelcache.entry_ok(rebuilt)  # a whole entry again, same key
    half = cache / "half.bin"
    half.write_bytes(raw[: len(raw) // 2])
    assert not modelcache.entry_ok(half)
    hows = [r_["how"] for r_ in modelcache.read_log(_log_of(cache))]
    assert hows == ["compiled", "compiled"]


@pytest.mark.slow
def test_unwritable_cache_folder_runs_and_says_why_once(tmp_path):
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the cache folder should be")
    r = _result(_start(blocker / "cache", fits=2, small=True))  # the small model: see the test above
    assert r["compiles"] == 1  # the second fit reuses the model compiled in this process
    assert r["draws"][0] == r["draws"][1]
    assert len(r["cache_warnings"]) == 1 and "cannot be written" in r["cache_warnings"][0]


def test_cache_folder_precedence(monkeypatch, tmp_path):
    monkeypatch.delenv(cachedir.ENV_VAR, raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert cachedir.resolve() == (tmp_path / "xdg" / "bayesdid", "XDG_CACHE_HOME")
    monkeypatch.setenv(cachedir.ENV_VAR, str(tmp_path / "env"))
    assert cachedir.resolve() == ((tmp_path / "env").resolve(), cachedir.ENV_VAR)
    assert cachedir.resolve(tmp_path / "opt") == ((tmp_path / "opt").resolve(), "--cache-dir")
    monkeypatch.delenv(cachedir.ENV_VAR)
    monkeypatch.delenv("XDG_CACHE_HOME")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert cachedir.resolve() == (tmp_path / "home" / ".cache" / "bayesdid", "home")


def test_entry_of_other_material_or_damaged_is_refused(tmp_path):
    path = tmp_path / "x.model"
    modelcache._write_entry(path, {"material": {"versions": {"pytensor": "1"}}, "logp": b"code"})
    assert modelcache.entry_ok(path)
    assert modelcache._read_entry(path, {"versions": {"pytensor": "1"}})["logp"] == b"code"
    with pytest.raises(modelcache.DamagedEntry, match="another model or version"):
        modelcache._read_entry(path, {"versions": {"pytensor": "2"}})
    raw = bytearray(path.read_bytes())
    raw[-3] ^= 0xFF  # one flipped byte in the payload
    path.write_bytes(bytes(raw))
    with pytest.raises(modelcache.DamagedEntry, match="checksum"):
        modelcache._read_entry(path, {"versions": {"pytensor": "1"}})
    assert not modelcache.entry_ok(path)
    path.write_bytes(b"something else entirely")
    with pytest.raises(modelcache.DamagedEntry, match="header"):
        modelcache._read_entry(path, {"versions": {"pytensor": "1"}})


def test_cache_command_info_and_clear(tmp_path, capsys):
    from bayesdid.cli import main

    folder = tmp_path / "c"
    (folder / "models").mkdir(parents=True)
    (folder / "models" / "abc.model").write_bytes(b"x" * 100)  # not a whole entry
    (folder / "keep.txt").write_text("not ours")
    suite_folder = cachedir.current().path
    try:
        assert main(["--cache-dir", str(folder), "cache", "info"]) == 0
        out = capsys.readouterr().out
        assert f"cache folder: {folder}" in out and "compiled models: 1 (1 damaged" in out
        assert main(["cache", "clear", "--cache-dir", str(folder)]) == 0
        assert "removed 1 compiled model(s)" in capsys.readouterr().out
        assert not (folder / "models").exists() and (folder / "keep.txt").exists()  # only bayesdid's parts
    finally:
        cachedir.configure(suite_folder)  # back to the suite's folder


def test_compile_log_records_and_summary_table(tmp_path, monkeypatch):
    """Each model asked for is one JSON line; models of one structure in two sizes share the
    size-free structure digest and differ in key; the suite's end-of-session table adds them up."""
    import numpy as np
    import pymc as pm
    from conftest import compile_table

    def tiny(n: int):
        with pm.Model(coords={"unit": [f"u{i}" for i in range(n)]}) as m:
            a = pm.Normal("a", 0, 1, dims="unit")
            pm.Normal("y", a, 1, observed=np.zeros(n), dims="unit")
        return m

    log = tmp_path / "log.jsonl"
    monkeypatch.setenv(modelcache.LOG_ENV, str(log))
    monkeypatch.setenv("PYTEST_CURRENT_TEST", "tests/test_x.py::test_y (call)")
    small, large = tiny(3), tiny(5)
    ks, _ = modelcache.fingerprint(small)
    kl, _ = modelcache.fingerprint(large)
    assert ks != kl  # sizes are baked into the compiled code, so they are part of the key
    modelcache._log(small, ks, "compiled", 12.5)
    modelcache._log(large, kl, "compiled", 7.5)
    modelcache._log(small, ks, "loaded", 0.5)
    with open(log, "a") as fh:
        fh.write('{"time": 1, "how": "comp')  # a line cut short by a killed process is skipped
    recs = modelcache.read_log(log)
    assert [r["how"] for r in recs] == ["compiled", "compiled", "loaded"]
    assert recs[0]["test"] == "tests/test_x.py::test_y" and recs[0]["dims"] == {"unit": 3}
    assert recs[1]["dims"] == {"unit": 5} and recs[0]["free"] == ["a"]
    assert recs[0]["structure"] == recs[1]["structure"] and recs[0]["key"] != recs[1]["key"]
    lines = compile_table(recs)
    assert lines[0].startswith("2 real compile(s), 20 s; 2 distinct model(s), 1 distinct structure(s)")
    assert lines[2].split() == ["tests/test_x.py", "2", "20", "1", "1", "0"]
    monkeypatch.delenv(modelcache.LOG_ENV)
    modelcache._log(small, ks, "compiled", 1.0)  # unset: nothing is written
    assert len(modelcache.read_log(log)) == 3


@pytest.mark.slow
def test_entry_for_other_sizes_is_not_loaded(tmp_path):
    """A model whose sizes all live in data containers and dims has one graph fingerprint for every
    size; the machine code is not size-generic (nutpie's flat parameter vector), so an entry compiled
    for 3 units must not be loaded for 5: it is compiled again, and the draws have the model's sizes."""
    import warnings

    import numpy as np
    import nutpie
    import pymc as pm

    from bayesdid import sample

    def tiny(n: int):
        with pm.Model(coords={"unit": [f"u{i}" for i in range(n)]}) as m:
            y = pm.Data("y", np.linspace(-1.0, 1.0, n), dims="unit")
            a = pm.Normal("a", 0, 1, dims="unit")
            pm.Normal("obs", a, 1, observed=y, dims="unit")
        return m

    suite_folder = cachedir.current().path
    cachedir.configure(tmp_path / "cache")
    try:
        small, large = tiny(3), tiny(5)
        assert modelcache.fingerprint(small)[0] == modelcache.fingerprint(large)[0]  # one key for both sizes
        assert modelcache.compile_cached(small, sample.compile_exact)[1] == "compiled"
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            compiled, how = modelcache.compile_cached(large, sample.compile_exact)
        assert how == "compiled"
        assert any("other sizes" in str(w.message) for w in caught)
        tree = nutpie.sample(compiled, draws=50, tune=50, chains=1, seed=1, progress_bar=False)
        assert tree["posterior"]["a"].shape == (1, 50, 5)
        assert modelcache.entry_ok(next((tmp_path / "cache" / "models").glob("*.model")))
    finally:
        cachedir.configure(suite_folder)
