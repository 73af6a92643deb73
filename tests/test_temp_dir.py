"""A fit leaves nothing in the system's temporary folder: PyTensor's generated source and compile
artefacts, numba's cache and bayesdid's own partial files all go to the cache folder or the run folder.

The fit runs as a separate process with TMPDIR pointed at an empty folder and a fresh cache folder, so
that the model is compiled cold (the case that writes generated source). The model is tiny (invented
jurisdictions of Valmora, 4 x 2 x 4 cells, 1 chain of 20 draws).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


def _write_case(d: Path) -> Path:
    rng = np.random.default_rng(4)
    names = ["Arvel", "Brisa", "Corran", "Dunmere"]
    rows = [
        (j, g, t, float(rng.normal(10 + (g == "target") - 0.5 * (j == "Arvel" and g == "target" and t >= 3), 1)))
        for j in names
        for g in ("other", "target")
        for t in range(1, 5)
        for _ in range(2)
    ]
    pd.DataFrame(rows, columns=["region", "group", "period", "y"]).to_csv(d / "table.csv", index=False)
    study = d / "study.toml"
    study.write_text("""
[data]
table = "table.csv"
outcome = "y"
jurisdiction = "region"
period = "period"
group = "group"
[policy]
target_group = "target"
adopters = { "Arvel" = 3 }
[sampler]
chains = 1
draws = 20
tune = 20
[crosscheck]
draws = 19
placebos = 3
""")
    return study


@pytest.mark.slow
def test_a_cold_fit_writes_nothing_into_the_system_temporary_folder(tmp_path):
    study = _write_case(tmp_path)
    system_tmp, cache = tmp_path / "system-tmp", tmp_path / "cache"
    system_tmp.mkdir()
    env = {
        k: v
        for k, v in os.environ.items()
        if k not in ("PYTENSOR_FLAGS", "NUMBA_CACHE_DIR", "BAYESDID_CACHE_DIR", "XDG_CACHE_HOME")
    }
    env.update(TMPDIR=str(system_tmp), TEMP=str(system_tmp), TMP=str(system_tmp), BAYESDID_CACHE_DIR=str(cache))
    proc = subprocess.run(
        [sys.executable, "-m", "bayesdid.cli", "fit", str(study), "--out", str(tmp_path / "run"), "--quiet"],
        env=env,
        capture_output=True,
        text=True,
        timeout=1200,
    )
    assert proc.returncode == 0, proc.stderr
    assert (tmp_path / "run" / "manifest.json").is_file()
    left = sorted(str(p.relative_to(system_tmp)) for p in system_tmp.rglob("*"))
    assert left == [], f"left in the system's temporary folder: {left[:10]} ({len(left)} in all)"
    # the compile did write its artefacts, into the cache folder
    assert any(p.is_file() for p in (cache / "pytensor").rglob("*")), sorted(cache.rglob("*"))[:10]
    assert any((cache / "models").iterdir())


def test_with_an_unwritable_cache_folder_the_private_compile_folder_goes_with_the_process(tmp_path):
    """The fallback when the cache folder cannot be written is a private temporary folder for
    PyTensor; it is removed when the process ends, not left in the system's temporary folder."""
    system_tmp = tmp_path / "system-tmp"
    system_tmp.mkdir()
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    env = {k: v for k, v in os.environ.items() if k not in ("PYTENSOR_FLAGS", "NUMBA_CACHE_DIR", "XDG_CACHE_HOME")}
    env.update(TMPDIR=str(system_tmp), BAYESDID_CACHE_DIR=str(blocker / "cache"))
    code = "import os, bayesdid, pytensor; d = pytensor.config.base_compiledir; print(d); assert os.path.isdir(d)"
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    used = Path(proc.stdout.strip().splitlines()[-1])
    assert used.parent == system_tmp and used.name.startswith("bayesdid-pytensor-")  # it was there while running
    assert sorted(system_tmp.iterdir()) == []
