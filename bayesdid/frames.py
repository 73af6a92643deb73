"""Tables held in memory (a pandas DataFrame given to ``make_study(table=...)`` in a notebook).

A frame is registered under a name ``in-memory:<first 16 hex digits of its SHA-256>``, which the study
keeps as its ``data.table``: :func:`bayesdid.data.read_table` returns a copy of the frame and
:func:`bayesdid.data.file_sha256` its hash, so the run folder's manifest records the data's identity
as for a file. The hash covers the column names, the dtypes and every value (pandas'
``hash_pandas_object``, index included). Frames live for the process; a sweep's worker processes do
not see them (run such sweeps with ``--serial``, or save the table to a file).
"""

from __future__ import annotations

import hashlib

__all__ = ["PREFIX", "register", "is_memory", "frame_of", "sha256_of"]

PREFIX = "in-memory:"
_FRAMES: dict[str, tuple[object, str]] = {}


def register(frame) -> str:
    """Keep a copy of ``frame``; returns its name (``in-memory:<hash>``)."""
    import pandas as pd

    h = hashlib.sha256()
    h.update(repr([(str(c), str(t)) for c, t in frame.dtypes.items()]).encode("utf-8"))
    h.update(pd.util.hash_pandas_object(frame, index=True).to_numpy().tobytes())
    digest = h.hexdigest()
    name = PREFIX + digest[:16]
    _FRAMES[name] = (frame.copy(), digest)
    return name


def is_memory(path) -> bool:
    return str(path).startswith(PREFIX)


def _get(path):
    try:
        return _FRAMES[str(path)]
    except KeyError:
        from .errors import DataRoleError

        raise DataRoleError(
            f"table '{path}' was a data frame held in another Python process; it is not in this "
            "one. Pass the frame to make_study again, or save it to a CSV or Parquet file."
        ) from None


def frame_of(path):
    """A copy of the registered frame."""
    return _get(path)[0].copy()


def sha256_of(path) -> str:
    return _get(path)[1]
