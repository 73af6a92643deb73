"""Resuming a sweep: which variant folders are complete, the rows as they stand, the lock, the --out check."""

from __future__ import annotations

import json
import os
from pathlib import Path

from ..errors import SweepError
from ..outputs import owner_alive, owner_tag, probe_writable, process_start
from .spec import SweepPlan
from .tables import _row


# ---- results on disk ---------------------------------------------------------------------------
def variant_is_complete(folder: Path, vid: str) -> bool:
    """True when ``folder`` holds a finished, readable run of variant ``vid``."""
    try:
        info = json.loads((folder / "variant.json").read_text())
        if info.get("id") != vid or info.get("status") != "done":
            return False
        json.loads((folder / "summary.json").read_text())
        json.loads((folder / "manifest.json").read_text())
        import h5py

        with h5py.File(folder / "posterior.nc", "r") as fh:
            return "posterior" in fh
    except Exception:
        return False


def read_results(out: str | Path, plan: SweepPlan) -> list[dict]:
    """Rows of summary.csv in plan order, read from the variant folders and the failure records."""
    out = Path(out)
    failed = {}
    mpath = out / "manifest.json"
    if mpath.is_file():
        try:
            for r in json.loads(mpath.read_text()).get("variants", []):
                if r.get("status") == "failed":
                    failed[r["id"]] = r.get("error", "")
        except json.JSONDecodeError:
            pass
    return _rows_now(out, plan, failed)


def _rows_now(out: Path, plan: SweepPlan, failed: dict) -> list[dict]:
    rows = []
    for v in plan.variants:
        folder = out / "variants" / v.id
        if variant_is_complete(folder, v.id):
            rows.append(_row(v, "done", json.loads((folder / "summary.json").read_text())))
        elif v.id in failed:
            rows.append(_row(v, "failed", None, failed[v.id]))
        else:
            rows.append(_row(v, "missing", None))
    return rows


class _Lock:
    """DIR/.sweep.lock naming its owner (host, pid and the process's start time, as JSON).

    Taken with an exclusive create; a lock whose owner is dead (a killed sweep), or whose pid now
    belongs to another process, is stale and taken over. A lock of a live sweep, or of one on
    another machine, is refused with how to proceed.
    """

    def __init__(self, out: Path):
        self.path = out / ".sweep.lock"

    def _owner(self) -> dict:
        try:
            body = json.loads(self.path.read_text() or "{}")
        except (OSError, ValueError):
            return {}
        if isinstance(body, int):  # the plain pid written by earlier versions
            body = {"owner": owner_tag(body)}
        return body if isinstance(body, dict) else {}

    def __enter__(self):
        me = json.dumps({"owner": owner_tag(), "pid": os.getpid(), "start": process_start(os.getpid())})
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                owner = self._owner()
                tag = str(owner.get("owner", ""))
                if tag and owner_alive(tag, owner.get("start")):
                    here = tag.partition("-")[0] == owner_tag().partition("-")[0]
                    raise SweepError(
                        f"another sweep (process {tag.partition('-')[2]}{'' if here else ' on another machine'}) "
                        f"is writing to '{self.path.parent}'; wait for it to finish or choose another --out. If no "
                        f"sweep runs there, delete '{self.path}'."
                    ) from None
                self.path.unlink(missing_ok=True)  # stale: its owner is dead
                continue
            with os.fdopen(fd, "w") as fh:
                fh.write(me)
            return self
        raise SweepError(f"could not take the lock '{self.path}'; another process keeps creating it. Retry.")

    def __exit__(self, *exc):
        self.path.unlink(missing_ok=True)
        return False


def check_sweep_folder(out: str | Path) -> Path:
    """Refuse, before any work, a sweep --out that is a file, a non-empty folder holding no sweep, or
    a folder under which nothing can be created. A folder of an earlier sweep is reused (resumed)."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise SweepError(
            f"--out '{out}' is a file, not a folder; give a folder for the sweep's results (a file is never replaced)."
        )
    if (
        out.is_dir()
        and any(out.iterdir())
        and not (out / "manifest.json").is_file()
        and not (out / "variants").is_dir()
    ):
        raise SweepError(f"--out '{out}' already exists and holds files but no sweep; choose another folder.")
    anchor = out
    while not anchor.exists() and anchor.parent != anchor:
        anchor = anchor.parent
    if not anchor.is_dir():
        raise SweepError(f"--out '{out}': '{anchor}' is a file, not a folder; choose another --out.")
    why = probe_writable(anchor)
    if why is not None:
        raise SweepError(
            f"--out '{out}': nothing can be written in folder '{anchor}' ({why}); choose an --out in "
            "a folder you can write to."
        )
    return out
