"""Where compiled models live on disk, and the settings that point PyTensor and numba there.

The cache folder is, in order of precedence: the command line's ``--cache-dir``, the environment
variable ``BAYESDID_CACHE_DIR``, ``$XDG_CACHE_HOME/bayesdid``, else ``~/.cache/bayesdid``. It holds

    models/    bayesdid's compiled-model entries (see :mod:`bayesdid.modelcache`)
    pytensor/  PyTensor's compile folder (its numba cache and generated source)
    numba/     numba's own cache of functions defined in files

PyTensor and numba read their folders when they are first imported, so :func:`configure` must run
before either is imported; ``bayesdid/__init__.py`` calls it with the environment's choice, and the
command line calls it again with ``--cache-dir`` before any heavy import. The choice is also put in
the environment so that worker processes (sweeps, calibration, Dask workers on this machine) use the
same folder.

A folder that cannot be written (read-only, full disk) never stops a run: compiled models are then
kept in this process only, PyTensor writes into a private temporary folder, and one warning says why
the run is slower.
"""

from __future__ import annotations

import atexit
import os
import shutil
import sys
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

from .errors import BayesDidError, CacheWarning

__all__ = ["ENV_VAR", "CacheDir", "resolve", "configure", "current", "info", "clear", "warn_once"]

ENV_VAR = "BAYESDID_CACHE_DIR"
#: The subfolders bayesdid owns inside the cache folder; `clear` removes only these.
SUBFOLDERS = ("models", "pytensor", "numba")


@dataclass(frozen=True)
class CacheDir:
    """The cache folder in use: where it is, where the choice came from, and whether it can be written."""

    path: Path
    source: str
    writable: bool
    reason: str = ""

    @property
    def models(self) -> Path:
        return self.path / "models"


_CURRENT: CacheDir | None = None
_WARNED: set[str] = set()


def resolve(override: str | os.PathLike | None = None) -> tuple[Path, str]:
    """The cache folder and where the choice came from (option, environment, XDG, home)."""
    if override is not None and str(override) != "":
        return Path(override).expanduser().resolve(), "--cache-dir"
    env = os.environ.get(ENV_VAR, "")
    if env:
        return Path(env).expanduser().resolve(), ENV_VAR
    xdg = os.environ.get("XDG_CACHE_HOME", "")
    if xdg and Path(xdg).is_absolute():
        return Path(xdg) / "bayesdid", "XDG_CACHE_HOME"
    return Path.home() / ".cache" / "bayesdid", "home"


def _probe(path: Path) -> tuple[bool, str]:
    """Can bayesdid write into ``path``? Creates it and the subfolders when missing."""
    try:
        for sub in SUBFOLDERS:
            (path / sub).mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(dir=path / "models", prefix=".probe-")
        try:
            os.write(fd, b"x" * 4096)
        finally:
            os.close(fd)
            os.unlink(probe)
    except OSError as exc:
        return False, f"{exc.strerror or exc} ({exc.filename or path})"
    return True, ""


def configure(override: str | os.PathLike | None = None) -> CacheDir:
    """Choose the cache folder and point PyTensor and numba into it (before they are imported).

    Called again after PyTensor was imported, it keeps the folders PyTensor already uses for
    PyTensor and numba but switches bayesdid's own model entries to the new folder.
    """
    global _CURRENT
    path, source = resolve(override)
    writable, reason = _probe(path)
    _CURRENT = CacheDir(path=path, source=source, writable=writable, reason=reason)
    os.environ[ENV_VAR] = str(path)  # worker processes follow
    if "pytensor" not in sys.modules:
        if writable:
            compiledir = path / "pytensor"
        else:  # private to this process, and removed when it ends
            compiledir = Path(tempfile.mkdtemp(prefix="bayesdid-pytensor-"))
            atexit.register(shutil.rmtree, compiledir, ignore_errors=True)
        flags = [
            f
            for f in os.environ.get("PYTENSOR_FLAGS", "").split(",")
            if f and not f.strip().startswith(("base_compiledir", "generated_src_dir"))
        ]
        # generated_src_dir: without it PyTensor writes the Python source it generates for each
        # compiled function into a new file of the system's temporary folder and never removes it
        os.environ["PYTENSOR_FLAGS"] = ",".join(
            [*flags, f"base_compiledir={compiledir}", f"generated_src_dir={compiledir / 'generated_src'}"]
        )
    if "numba" not in sys.modules and writable:
        os.environ["NUMBA_CACHE_DIR"] = str(path / "numba")
    return _CURRENT


def current() -> CacheDir:
    """The cache folder in use (configured from the environment on first use)."""
    return _CURRENT if _CURRENT is not None else configure()


def warn_once(key: str, message: str) -> None:
    """One warning per process and cause (a read-only folder should not repeat on every fit)."""
    if key in _WARNED:
        return
    _WARNED.add(key)
    warnings.warn(message, CacheWarning, stacklevel=3)


def _size(path: Path) -> tuple[int, int]:
    files, total = 0, 0
    for root, _, names in os.walk(path):
        for n in names:
            try:
                total += (Path(root) / n).stat().st_size
                files += 1
            except OSError:
                pass
    return files, total


def info(cache: CacheDir | None = None, *, entry_ok=None) -> dict:
    """What the cache folder holds: compiled-model entries and the size of each part.

    ``entry_ok`` (:func:`bayesdid.modelcache.entry_ok`, passed by the caller so that this lower module
    does not import the cache that builds on it) counts the damaged entries; without it ``damaged`` is
    None (not checked)."""
    c = cache or current()
    parts = {}
    for sub in SUBFOLDERS:
        files, total = _size(c.path / sub) if (c.path / sub).is_dir() else (0, 0)
        parts[sub] = {"files": files, "bytes": total}
    entries = sorted(c.models.glob("*.model")) if c.models.is_dir() else []
    damaged = sum(not entry_ok(e) for e in entries) if entry_ok is not None else None
    return {
        "folder": str(c.path),
        "chosen_by": c.source,
        "writable": c.writable,
        "reason": c.reason,
        "models": len(entries),
        "damaged": damaged,
        "parts": parts,
        "bytes": sum(p["bytes"] for p in parts.values()),
    }


def clear(cache: CacheDir | None = None) -> dict:
    """Remove bayesdid's subfolders of the cache folder (nothing else in it); returns what was removed."""
    c = cache or current()
    before = info(c)
    for sub in SUBFOLDERS:
        p = c.path / sub
        if p.is_dir():
            try:
                shutil.rmtree(p)
            except OSError as exc:
                raise BayesDidError(
                    f"cannot clear the cache folder {p}: {exc.strerror or exc}. Check its "
                    f"permissions, or remove it by hand."
                ) from None
    return before
