"""Collapse tables larger than memory: stream a CSV or Parquet file, a folder or a glob of Parquet files.

Why pyarrow's dataset scanner: it is already a dependency (the Parquet reader), reads CSV and
Parquet alike in record batches of bounded size, keeps text columns dictionary-encoded (a 200-million
row table of a few dozen jurisdictions costs a few integers per row), and needs no service or second
engine (DuckDB would be a new dependency for one ``GROUP BY``; a Dask dataframe holds partitions as
pandas frames, several times the memory of the Arrow batches). Dask is used only to spread the files
over workers (``--cluster``), with the very same per-file function.

Each file (a dataset fragment) is reduced, batch by batch, to per-cell count, mean and within sum of
squares; batches and files are merged with the pairwise update of Chan, Golub and LeVeque (1979),
``ss = ss_a + ss_b + (mean_b - mean_a)^2 n_a n_b / (n_a + n_b)``, which keeps the within sums
accurate where ``sum y^2 - (sum y)^2 / n`` would cancel. The per-cell totals then go through the same
checks and cells as a table of cell means (``data.summary = "mean"``): the cells equal the in-memory
collapse to rounding. The local and the Dask paths run the same function on the same files and merge
the results in file order, so their cells are equal bit for bit.

Supported: observation rows without covariates, weights or units, in every family. The binomial and
count families are reduced to per-cell sums of the outcome and of the trials or exposure (exact for
whole numbers), passed on as one aggregated row per cell; their cells (``n``, ``sum_y`` and the
likelihood's records) equal the in-memory ones, while ``ss`` and ``sum_y2``, which those families do
not use, are those of the cell rows. Covariates, weights and units are refused with the reason; read
such tables in memory.
"""

from __future__ import annotations

import glob
import hashlib
import os
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DataRoleError
from .model.family import family_record
from .study import Study

__all__ = ["collapse_stream", "stream_sources", "partial_of_file", "merge_partials", "listing_digest", "should_stream"]

BATCH_ROWS = 1 << 20


def should_stream(study: Study) -> bool:
    """True when ``data.table`` is a folder or a glob (they can only be streamed)."""
    text = str(study.table)
    return Path(text).is_dir() or any(ch in text for ch in "*?[")


def stream_sources(table: str | Path) -> tuple[list[str], str]:
    """The files to stream and their format ('csv' or 'parquet').

    Raises
    ------
    DataRoleError
        No file matches; a folder or glob mixing CSV and Parquet; an unknown file kind.
    """
    text = str(table)
    if Path(text).is_dir():
        files = sorted(str(p) for p in Path(text).rglob("*") if p.is_file() and not p.name.startswith((".", "_")))
    elif any(ch in text for ch in "*?["):
        files = sorted(f for f in glob.glob(text, recursive=True) if os.path.isfile(f))
    elif Path(text).is_file():
        files = [text]
    else:
        raise DataRoleError(
            f"table '{text}' does not exist; fix 'data.table' (a file, a folder of Parquet files or "
            "a glob such as 'claims/*.parquet')."
        )
    if not files:
        if Path(text).is_dir():
            raise DataRoleError(
                f"table '{text}' is a folder holding no data file (hidden files and names starting "
                "with '_' are skipped); put the Parquet files in it, or name one CSV or Parquet file "
                "in 'data.table'."
            )
        raise DataRoleError(f"table '{text}' matches no file; fix 'data.table' or the folder's contents.")
    kinds = {
        (
            "parquet"
            if f.lower().endswith((".parquet", ".pq"))
            else "csv"
            if f.lower().endswith((".csv", ".csv.gz", ".txt"))
            else "other"
        )
        for f in files
    }
    if "other" in kinds:
        bad = [f for f in files if not f.lower().endswith((".parquet", ".pq", ".csv", ".csv.gz", ".txt"))]
        raise DataRoleError(
            f"table '{text}' holds files that are neither CSV nor Parquet (e.g. {bad[:3]}); move them "
            "out of the folder or narrow the glob."
        )
    if len(kinds) > 1:
        raise DataRoleError(f"table '{text}' mixes CSV and Parquet files; stream one kind at a time.")
    kind = kinds.pop()
    if kind == "csv" and len(files) > 1:
        raise DataRoleError(
            f"table '{text}' is {len(files)} CSV files; a folder or glob must hold Parquet files "
            "(convert them, or give one CSV file)."
        )
    return files, kind


def _check_study(study: Study) -> None:
    c = study.columns
    reasons = []
    if study.model.covariates:
        reasons.append("covariates")
    for key in ("weight", "unit"):
        if getattr(c, key) is not None:
            reasons.append(f"data.{key}")
    if study.summary is not None:
        reasons.append("data.summary")
    if reasons:
        raise DataRoleError(
            f"the streaming collapse takes observation rows without covariates, weights or units "
            f"(any family); this study has {', '.join(reasons)}. Give a single file that fits in "
            "memory (without --stream or --cluster)."
        )


def _schemas(files: list[str], kind: str, used: list[str]) -> None:
    """Refuse Parquet files that disagree on the used columns or their types, naming both files."""
    if kind != "parquet":
        return
    import pyarrow.parquet as pq

    first = None
    for f in files:
        try:
            schema = pq.read_schema(f)
        except Exception as exc:  # noqa: BLE001 - pyarrow raises several kinds
            raise DataRoleError(
                f"file '{f}' of the table could not be read as Parquet ({type(exc).__name__}: {str(exc)[:200]})."
            ) from None
        missing = [c for c in used if c not in schema.names]
        if missing:
            raise DataRoleError(
                f"file '{f}' of the table lacks column(s) {missing} named in the study (it has "
                f"{schema.names[:20]}); every file of a folder must have the same columns."
            )
        types = {c: schema.field(c).type for c in used}
        norm = {c: str(t.value_type if hasattr(t, "value_type") else t).replace("large_", "") for c, t in types.items()}
        if first is None:
            first = (f, norm)
            continue
        diff = [c for c in used if norm[c] != first[1][c]]
        if diff:
            c = diff[0]
            raise DataRoleError(
                f"files of the table disagree on the type of column '{c}': {first[1][c]} in "
                f"'{first[0]}' but {norm[c]} in '{f}'. Write every file with the same schema."
            )


def _scanner(path: str, kind: str, used: list[str]):
    import pyarrow.dataset as ds

    if kind == "parquet":
        fmt = ds.ParquetFileFormat(read_options=ds.ParquetReadOptions(dictionary_columns=used[1:]))
    else:
        import pyarrow.csv as pcsv

        fmt = ds.CsvFileFormat(
            convert_options=pcsv.ConvertOptions(strings_can_be_null=True, null_values=[""]),
            read_options=pcsv.ReadOptions(block_size=64 << 20),
        )
    return ds.dataset(path, format=fmt).scanner(columns=used, batch_size=BATCH_ROWS, use_threads=True)


def _codes(arr, table: dict, what: str, where: str) -> np.ndarray:
    """Integer codes of a key column in this file; labels keyed by their text, as the in-memory path
    compares them. New labels are added to ``table`` (text -> (code, value))."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if arr.null_count:
        raise DataRoleError(
            f"column '{what}' has {arr.null_count} missing value(s) in {where}; every row needs it. "
            "Drop or fill those rows."
        )
    if not pa.types.is_dictionary(arr.type):
        arr = pc.dictionary_encode(arr)
    local = np.empty(len(arr.dictionary), dtype=np.int64)
    for i, v in enumerate(arr.dictionary.to_pylist()):
        code = table.get(str(v))
        if code is None:
            code = table[str(v)] = (len(table), v)
        local[i] = code[0]
    return local[arr.indices.to_numpy(zero_copy_only=False)]


def partial_of_file(path: str, kind: str, roles: dict, log_outcome: bool, family: str = "gaussian") -> dict:
    """Per-cell count, mean and within sum of squares of one file, merged over its batches in order.

    ``roles`` maps 'outcome', 'jurisdiction', 'period' and optionally 'group' and 'size' (trials or
    exposure) to column names. Returns ``{"labels": {role: {text: (code, value)}}, "rows": int, "dims",
    ...}`` with flat per-cell arrays ``n, mean, ss`` (Gaussian) or ``n, sy, sz`` (rows, sum of the
    outcome, sum of trials or exposure: the other families), in the file's own codes (mapped to global
    ones by :func:`merge_partials`).
    """
    keys = [r for r in ("jurisdiction", "group", "period") if roles.get(r)]
    state = {"labels": {r: {} for r in keys}, "rows": 0, "acc": {"dims": (0, 0, 0)}}
    used = [roles[r] for r in ("outcome", *keys)] + ([roles["size"]] if roles.get("size") else [])
    try:
        for batch in _scanner(path, kind, used).to_batches():
            _add_batch(state, batch, keys, roles, log_outcome, path, family)
    except DataRoleError:
        raise
    except Exception as exc:  # noqa: BLE001 - pyarrow's readers raise many kinds
        raise DataRoleError(
            f"file '{path}' of the table could not be read after row {state['rows']:,} "
            f"({type(exc).__name__}: {str(exc).strip()[:300]}). Check that column's values (numbers "
            "with a dot as decimal separator; an empty field for a missing value)."
        ) from None
    return {"labels": state["labels"], "rows": state["rows"], **state["acc"]}


def _numbers(batch, col: str, what: str, where: str) -> np.ndarray:
    import pyarrow as pa

    arr = batch.column(col)
    if pa.types.is_dictionary(arr.type) or not (pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type)):
        raise DataRoleError(
            f"{what} column '{col}' holds {arr.type} values in {where}, where numbers are "
            "expected; give numbers (an empty field for a missing value)."
        )
    if arr.null_count:
        raise DataRoleError(
            f"{what} column '{col}' has {arr.null_count} missing value(s) in {where}; drop those "
            "rows or fill them before the analysis."
        )
    v = arr.to_numpy(zero_copy_only=False).astype(float, copy=False)
    if not np.isfinite(v).all():
        raise DataRoleError(f"{what} column '{col}' has infinite values in {where}; replace or drop them.")
    return v


def _count_rows(y: np.ndarray, size: np.ndarray | None, roles: dict, family: str, where: str) -> np.ndarray:
    """Checks of a batch of binomial or count rows (as the in-memory checks); returns the sizes."""
    col = roles["outcome"]
    rec = family_record(family)
    if rec.size_role == "trials" and size is None:
        if ((y != 0) & (y != 1)).any():
            raise DataRoleError(
                f"outcome column '{col}' must be 0 or 1 for family '{family}' without a trials column; "
                f"{where} hold other values. Recode it, or name the trials in 'data.trials'."
            )
        return np.ones_like(y)
    if (y < 0).any() or (y != np.round(y)).any():
        raise DataRoleError(
            f"outcome column '{col}' must hold whole, non-negative counts for family '{family}'; {where} do not."
        )
    if rec.size_role == "trials":
        if (size < 1).any() or (size != np.round(size)).any():
            raise DataRoleError(
                f"trials column '{roles['size']}' must hold whole numbers of at least 1; {where} do not."
            )
        if (y > size).any():
            raise DataRoleError(
                f"trials column '{roles['size']}' is below the successes in '{col}' in {where}; "
                "check which column is which."
            )
    elif (size <= 0).any():
        raise DataRoleError(
            f"exposure column '{roles['size']}' must be positive (person-time); {where} hold zero "
            "or negative values. Drop rows with no person-time."
        )
    return size


def _add_batch(
    state: dict, batch, keys: list, roles: dict, log_outcome: bool, path: str, family: str = "gaussian"
) -> None:
    """Fold one record batch into ``state`` (labels, rows read, per-cell accumulator)."""
    if batch.num_rows == 0:
        return
    rows, labels = state["rows"], state["labels"]
    where = f"rows {rows + 1:,}-{rows + batch.num_rows:,} of '{path}'"
    col = roles["outcome"]
    y = _numbers(batch, col, "outcome", where)
    if log_outcome:
        if (y <= 0).any():
            raise DataRoleError(
                f"outcome column '{col}' has values at or below zero in {where}, but "
                "model.log_outcome = true needs positive values."
            )
        y = np.log(y)
    codes = {r: _codes(batch.column(roles[r]), labels[r], roles[r], where) for r in keys}
    zero = np.zeros(len(y), dtype=np.int64)
    dims = tuple(max(len(labels[r]), 1) if r in labels else 1 for r in ("jurisdiction", "group", "period"))
    idx = (codes["jurisdiction"] * dims[1] + codes.get("group", zero)) * dims[2] + codes["period"]
    size = dims[0] * dims[1] * dims[2]
    n_b = np.bincount(idx, minlength=size).astype(float)
    s_b = np.bincount(idx, weights=y, minlength=size)
    rec = family_record(family)
    if not rec.cell_model:
        sz = _numbers(batch, roles["size"], rec.size_role, where) if roles.get("size") else None
        sz = _count_rows(y, sz, roles, family, where)
        part = {"n": n_b, "sy": s_b, "sz": np.bincount(idx, weights=sz, minlength=size), "dims": dims}
        state["acc"] = _merge_dense(state["acc"], part)
        state["rows"] = rows + batch.num_rows
        return
    m_b = np.where(n_b > 0, s_b / np.where(n_b > 0, n_b, 1.0), 0.0)
    dev = y - m_b[idx]
    ss_b = np.bincount(idx, weights=dev * dev, minlength=size)
    state["acc"] = _merge_dense(state["acc"], {"n": n_b, "mean": m_b, "ss": ss_b, "dims": dims})
    state["rows"] = rows + batch.num_rows


def _grow(a: np.ndarray, old: tuple, new: tuple) -> np.ndarray:
    out = np.zeros(new)
    if a.size:
        out[: old[0], : old[1], : old[2]] = a.reshape(old)
    return out


def _merge_dense(a: dict, b: dict) -> dict:
    """Merge two per-cell accumulators on a common, grown grid: Chan's pairwise update of (n, mean, ss)
    for the Gaussian family, plain sums of (n, sy, sz) otherwise."""
    dims = tuple(max(x, y) for x, y in zip(a["dims"], b["dims"]))
    if "mean" not in b:
        return {
            "dims": dims,
            **{
                k: (_grow(a[k], a["dims"], dims) if k in a else np.zeros(dims)).ravel()
                + _grow(b[k], b["dims"], dims).ravel()
                for k in ("n", "sy", "sz")
            },
        }
    na, ma, sa = (_grow(a[k], a["dims"], dims) if k in a else np.zeros(dims) for k in ("n", "mean", "ss"))
    nb, mb, sb = (_grow(b[k], b["dims"], dims) for k in ("n", "mean", "ss"))
    n = na + nb
    safe = np.where(n > 0, n, 1.0)
    delta = mb - ma
    mean = np.where(nb > 0, np.where(na > 0, ma + delta * (nb / safe), mb), ma)
    ss = sa + sb + np.where((na > 0) & (nb > 0), delta * delta * (na * nb / safe), 0.0)
    return {"n": n.ravel(), "mean": mean.ravel(), "ss": ss.ravel(), "dims": dims}


def merge_partials(parts: list[dict]) -> tuple[dict, dict]:
    """Merge per-file partials in order on global label codes; returns (labels, dense accumulator)."""
    keys = ("jurisdiction", "group", "period")
    glob_labels: dict[str, dict] = {k: {} for k in keys}
    acc = {"dims": (0, 0, 0)}
    rows = 0
    for p in parts:
        maps = []
        for k in keys:
            own = p["labels"].get(k)
            if own is None:
                maps.append(np.zeros(1, dtype=np.int64))
                glob_labels[k].setdefault("all", (0, "all"))
                continue
            m = np.empty(len(own), dtype=np.int64)
            for text, (code, value) in own.items():
                g = glob_labels[k].get(text)
                if g is None:
                    g = glob_labels[k][text] = (len(glob_labels[k]), value)
                m[code] = g[0]
            maps.append(m)
        dims = tuple(max(len(glob_labels[k]), 1) for k in keys)
        pd_ = p["dims"]
        if not pd_[0] or "n" not in p or not p["n"].size:
            continue
        fields = ("n", "mean", "ss") if "mean" in p else ("n", "sy", "sz")
        jj, gg, tt = np.ix_(maps[0][: pd_[0]], maps[1][: pd_[1]], maps[2][: pd_[2]])
        part = {"dims": dims}
        for k in fields:
            arr = np.zeros(dims)
            arr[jj, gg, tt] = p[k].reshape(pd_)
            part[k] = arr.ravel()
        acc = _merge_dense(acc, part)
        rows += p["rows"]
    acc["rows"] = rows
    return glob_labels, acc


def listing_digest(files: list[str]) -> str:
    """SHA-256 of the file names, sizes and modification times (the files themselves are not re-read)."""
    h = hashlib.sha256()
    for f in files:
        st = os.stat(f)
        h.update(f"{f}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
    return "listing:" + h.hexdigest()


def _cluster_map(cluster: str, fn, args_list) -> list:
    """``fn(*args)`` for each args on Dask (a scheduler address or 'local'), results in input order."""
    from distributed import Client, LocalCluster

    local = None
    if cluster == "local":
        local = LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None, silence_logs=40
        )
        client = Client(local)
    else:
        try:
            client = Client(cluster, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise DataRoleError(
                f"cannot reach the Dask scheduler at --cluster '{cluster}': {exc}. Start one "
                "(dask scheduler) or use --cluster local."
            ) from None
    try:
        futures = [client.submit(fn, *a, pure=False) for a in args_list]
        return client.gather(futures)
    finally:
        client.close()
        if local is not None:
            local.close()


def collapse_stream(study: Study, *, cluster: str | None = None):
    """Stream ``study.table`` and collapse it to cells (see the module docstring).

    Returns ``(cells, digest)``: the cells, and a digest of the file listing.

    Raises
    ------
    DataRoleError
        Unsupported study shapes; no file; files disagreeing on columns or types; missing or non-numeric
        values in a role column (naming the rows and the file); then every check of the cell table.
    """
    _check_study(study)
    c = study.columns
    files, kind = stream_sources(study.table)
    family = study.model.family
    rec = family_record(family)
    size_col = getattr(c, rec.size_role) if rec.size_role else None
    roles = {
        "outcome": c.outcome,
        "jurisdiction": c.jurisdiction,
        "period": c.period,
        "group": c.group,
        "size": size_col,
    }
    roles = {k: v for k, v in roles.items() if v}
    _schemas(files, kind, list(roles.values()))
    args = [(f, kind, roles, study.model.log_outcome, family) for f in files]
    if cluster:
        parts = _cluster_map(cluster, partial_of_file, args)
    else:
        parts = [partial_of_file(*a) for a in args]
    labels, acc = merge_partials(parts)
    if "n" not in acc:
        raise DataRoleError(
            f"table '{study.table}' has no rows; the study needs rows for every jurisdiction and period."
        )
    J, G, T = acc["dims"]
    n = acc["n"].reshape(J, G, T)
    jv = [v for _, v in sorted(labels["jurisdiction"].values())]
    gv = [v for _, v in sorted(labels["group"].values())]
    tv = [v for _, v in sorted(labels["period"].values())]
    jj, gg, tt = np.nonzero(n > 0)
    table = {
        c.jurisdiction: [str(v) for v in np.asarray(jv, dtype=object)[jj]],
        c.period: list(np.asarray(tv, dtype=object)[tt]),
    }
    if c.group:
        table[c.group] = [str(v) for v in np.asarray(gv, dtype=object)[gg]]
    from dataclasses import replace

    from .cells import collapse

    if rec.cell_model:
        mean, ss = (acc[k].reshape(J, G, T) for k in ("mean", "ss"))
        k = n[jj, gg, tt]
        with np.errstate(invalid="ignore", divide="ignore"):
            sd = np.where(k > 1, np.sqrt(ss[jj, gg, tt] / np.maximum(k - 1, 1)), np.nan)
        table.update({c.outcome: mean[jj, gg, tt], "__count": k, "__spread": sd})
        as_cells = study.replace(
            summary="mean", columns={"count": "__count", "sd": "__spread"}, model={"log_outcome": False}
        )
    else:  # one row per cell with the summed outcome and trials or exposure: the families' own aggregated form
        sy, sz = (acc[k].reshape(J, G, T)[jj, gg, tt] for k in ("sy", "sz"))
        size_name = size_col or "__trials"
        table.update({c.outcome: sy, size_name: sz})
        as_cells = study if size_col else study.replace(columns={"trials": "__trials"})
    cells = collapse(as_cells, pd.DataFrame(table))
    return replace(cells, log_outcome=study.model.log_outcome, rows=int(acc["rows"])), listing_digest(files)
