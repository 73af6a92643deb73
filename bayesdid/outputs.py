"""Output folders: checked before any work, written atomically, nothing left behind.

Every folder bayesdid writes (a run, a checks folder, a sweep, a calibration) carries a
``manifest.json`` whose object has a ``"bayesdid"`` key; that is how :func:`is_bayesdid_folder`
recognises one, and ``--replace`` replaces nothing else.

:class:`atomic_folder` writes into a hidden sibling ``.NAME.partial-HOST-PID-RANDOM`` and renames
it into place only on success. The owner's host and process id in the name let the next write of
the same folder remove what a killed process left (:func:`clean_leftovers`): a partial folder whose
owner is dead, and a ``.NAME.old-HOST-PID`` (an earlier run being swapped out when its writer was
killed), which is put back when ``NAME`` is missing and removed otherwise.

Needs only the standard library.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import shutil
import socket
import tempfile
import time
import uuid
from pathlib import Path

from .errors import OutputError
from .version import __version__

__all__ = [
    "atomic_folder",
    "check_output_folder",
    "is_bayesdid_folder",
    "clean_leftovers",
    "owner_tag",
    "owner_alive",
    "process_start",
    "probe_writable",
    "MANIFEST",
    "atomic_write",
]

MANIFEST = "manifest.json"


# ---- owners of temporary names --------------------------------------------------------------------
def _host() -> str:
    """8 hex digits naming this machine (folders may sit on a disk that several machines share)."""
    return hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]


def owner_tag(pid: int | None = None) -> str:
    """``HOST-PID`` of this process (or of ``pid`` on this machine)."""
    return f"{_host()}-{os.getpid() if pid is None else int(pid)}"


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by someone else
        return True
    return True


def process_start(pid: int) -> str | None:
    """When process ``pid`` started (clock ticks since boot, from /proc on Linux), else None.

    A lock records it beside the pid, so that a dead owner whose pid was reused by another
    process is still recognised as dead.
    """
    try:
        stat = Path(f"/proc/{int(pid)}/stat").read_text()
    except OSError:
        return None
    return stat.rsplit(")", 1)[-1].split()[19]  # field 22 of proc(5), counted after the command name


def owner_alive(tag: str, start: str | None = None) -> bool:
    """False only when the owner ``HOST-PID`` is known to be dead: on this machine and not running
    (or running with another start time than ``start``). Owners on other machines count as alive."""
    host, _, pid = tag.partition("-")
    if host != _host() or not pid.isdigit():
        return True
    if not _pid_alive(int(pid)):
        return False
    if start is not None:
        now = process_start(int(pid))
        return now is None or now == start
    return True


# ---- what is already there ---------------------------------------------------------------------------
def is_bayesdid_folder(path: str | Path) -> bool:
    """True when ``path`` is a folder holding a ``manifest.json`` written by bayesdid."""
    p = Path(path) / MANIFEST
    try:
        body = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(body, dict) and "bayesdid" in body


def _nearest_existing(path: Path) -> Path:
    p = path
    while not p.exists() and not p.is_symlink():
        if p.parent == p:
            break
        p = p.parent
    return p


def probe_writable(folder: Path) -> str | None:
    """None when a folder can be created (and is removed again) in ``folder``; else the reason."""
    probe = folder / f".bayesdid-write-test-{owner_tag()}-{uuid.uuid4().hex[:6]}"
    try:
        probe.mkdir()
    except OSError as exc:
        return f"{type(exc).__name__}: {exc.strerror or exc}"
    try:
        probe.rmdir()
    except OSError:
        pass
    return None


def _listing(folder: Path, limit: int = 4) -> str:
    try:
        names = sorted(p.name for p in folder.iterdir())
    except OSError:
        return ""
    shown = ", ".join(names[:limit]) + (", ..." if len(names) > limit else "")
    return f" (it holds {shown})" if names else ""


def check_output_folder(
    target: str | Path, *, replace: bool = False, option: str = "--out", what: str = "run folder"
) -> Path:
    """Refuse, before any work, an output folder that cannot or may not be written.

    Refused: ``target`` is a file (never replaced, with or without ``replace``); a non-empty folder
    without ``replace``; with ``replace``, a non-empty folder that bayesdid did not write (no
    ``manifest.json`` of bayesdid); a parent path that runs through a file; a parent folder in which
    nothing can be created. Returns ``target`` as a Path.

    Raises
    ------
    OutputError
        Naming the option, the path, what is wrong and the fix.
    """
    t = Path(target)
    if t.is_symlink() and not t.exists():
        raise OutputError(f"{option} '{t}' is a broken symbolic link; remove it or choose another {option}.")
    if t.exists() and not t.is_dir():
        raise OutputError(
            f"{option} '{t}' is a file, not a folder: bayesdid writes a {what} there and never "
            f"replaces a file (not even with --replace). Choose another {option}."
        )
    if t.is_dir():
        try:
            full = any(t.iterdir())
        except OSError as exc:
            raise OutputError(
                f"{option} '{t}' cannot be read ({type(exc).__name__}: {exc.strerror or exc}); choose another {option}."
            ) from None
        if full and not is_bayesdid_folder(t):
            raise OutputError(
                f"{option} '{t}' already exists and holds files bayesdid did not write{_listing(t)}: it has no "
                f"manifest.json of bayesdid, so it is never replaced, not even with --replace. Choose another "
                f"{option}."
            )
        if full and not replace:
            raise OutputError(
                f"{option} '{t}' already exists and is not empty: it holds a bayesdid {what}. Choose "
                f"another {option}, or pass --replace to swap it for the new results once they are "
                "complete."
            )
    anchor = _nearest_existing(t.parent if t.name else t)
    if not anchor.is_dir():
        raise OutputError(
            f"{option} '{t}': '{anchor}' is a file, not a folder, so the {what} cannot be created "
            f"under it. Choose another {option}."
        )
    why = probe_writable(anchor)
    if why is not None:
        raise OutputError(
            f"{option} '{t}': nothing can be written in folder '{anchor}' ({why}). Choose an "
            f"{option} in a folder you can write to."
        )
    return t


# ---- leftovers of killed writers ---------------------------------------------------------------------
def _owner_of(name: str, marker: str) -> str | None:
    """``HOST-PID`` from a name such as ``.run.partial-HOST-PID-RANDOM`` (None for other names)."""
    rest = name.split(marker, 1)[1] if marker in name else ""
    parts = rest.split("-")
    if len(parts) >= 2 and len(parts[0]) == 8 and parts[1].isdigit():
        return f"{parts[0]}-{parts[1]}"
    return None


def clean_leftovers(target: str | Path) -> list[str]:
    """Remove what killed writers of ``target`` left beside it; returns the names handled.

    ``.NAME.partial-HOST-PID-*`` of a dead owner is removed. ``.NAME.old-HOST-PID`` of a dead owner is an
    earlier complete folder that was being swapped out: it is renamed back to ``NAME`` when ``NAME`` is
    missing (nothing already written is lost), and removed when ``NAME`` is there.
    """
    t = Path(target)
    parent = t.parent
    if not t.name or not parent.is_dir():
        return []
    handled = []
    try:
        entries = list(parent.iterdir())
    except OSError:
        return []
    for p in entries:
        for marker in (f".{t.name}.partial-", f".{t.name}.old-"):
            if not p.name.startswith(marker):
                continue
            tag = _owner_of(p.name, marker)
            if tag is None or owner_alive(tag):
                continue
            try:
                if marker.endswith(".old-") and not t.exists():
                    os.replace(p, t)
                elif p.is_dir() and not p.is_symlink():
                    shutil.rmtree(p)
                else:
                    p.unlink()
                handled.append(p.name)
            except OSError:
                pass
    return handled


# ---- the atomic writers --------------------------------------------------------------------------------
def atomic_write(target: str | Path, data: str | bytes, *, fsync: bool = False, mode: int = 0o644) -> Path:
    """Write one file atomically: a hidden sibling ``.NAME.partial-HOST-PID-RANDOM``, renamed onto ``target``.

    Readers see the old file or the new one, never a part. What killed writers of the same target
    left is removed first (:func:`clean_leftovers`); on any error the partial file is removed and
    the target is untouched. ``fsync`` flushes the bytes to disk before the rename (the compile cache
    asks for it: an entry is read back by other processes, possibly after a crash of the machine).
    """
    t = Path(target)
    clean_leftovers(t)
    fd, tmp = tempfile.mkstemp(prefix=f".{t.name}.partial-{owner_tag()}-", dir=t.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.chmod(tmp, mode)
        os.replace(tmp, t)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return t


def write_rows_csv(rows: list[dict], path: str | Path) -> Path:
    """Write records as CSV, columns in the order they first appear across the rows (a key missing
    from a row is an empty field). Used for per-rep tables inside an :class:`atomic_folder`."""
    keys: list[str] = []
    for r in rows:
        keys += [k for k in r if k not in keys]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=keys)
        w.writeheader()
        for r in rows:
            w.writerow(r)
    return Path(path)


class atomic_folder:
    """Write into a hidden sibling folder; rename it to ``target`` only on success.

    ``check()`` (also run on entering) refuses, before any work, what :func:`check_output_folder`
    refuses and removes the leftovers of killed writers of the same target. On success a folder
    without a ``manifest.json`` gets a minimal one (``bayesdid``, ``kind``, ``created``) so that it is
    recognised later; an existing bayesdid folder is swapped out only after the new one is complete.
    """

    def __init__(self, target: str | Path, *, replace: bool = False, kind: str = "run", option: str = "--out"):
        self.target = Path(target)
        self.replace = replace
        self.kind = kind
        self.option = option

    def check(self) -> None:
        """Raise :class:`~bayesdid.errors.OutputError` before any work when the target may not be written."""
        check_output_folder(self.target, replace=self.replace, option=self.option, what=f"{self.kind} folder")
        clean_leftovers(self.target)

    def __enter__(self) -> Path:
        t = self.target
        self.check()
        t.parent.mkdir(parents=True, exist_ok=True)
        self.tmp = t.parent / f".{t.name}.partial-{owner_tag()}-{uuid.uuid4().hex[:8]}"
        self.tmp.mkdir()
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            shutil.rmtree(self.tmp, ignore_errors=True)
            return False
        t = self.target
        try:
            if not (self.tmp / MANIFEST).is_file():
                (self.tmp / MANIFEST).write_text(
                    json.dumps(
                        {
                            "bayesdid": __version__,
                            "kind": self.kind,
                            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                        },
                        indent=2,
                    )
                    + "\n",
                    encoding="utf-8",
                )
            # the target may have appeared or changed while the work ran: check it again
            check_output_folder(t, replace=self.replace, option=self.option, what=f"{self.kind} folder")
        except BaseException:
            shutil.rmtree(self.tmp, ignore_errors=True)
            raise
        if t.is_dir() and any(t.iterdir()):
            old = t.with_name(f".{t.name}.old-{owner_tag()}")
            os.replace(t, old)
            os.replace(self.tmp, t)
            shutil.rmtree(old, ignore_errors=True)
        else:
            if t.is_dir():
                t.rmdir()
            os.replace(self.tmp, t)
        return False
