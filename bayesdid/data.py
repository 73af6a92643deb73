"""Reading the table and checking that its columns fit their roles.

Only this module and :mod:`bayesdid.cells` see rows; everything downstream works on cells.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd

from . import frames
from .errors import DataRoleError
from .model.family import family_record
from .study import Study

__all__ = ["read_table", "file_sha256", "check_roles", "period_levels", "check_family_inputs"]


def file_sha256(path: str | Path) -> str:
    if frames.is_memory(path):  # a data frame given to make_study
        return frames.sha256_of(path)
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _open_text_bytes(path: Path) -> bytes:
    if path.name.lower().endswith(".gz"):
        import gzip

        with gzip.open(path, "rb") as fh:
            return fh.read()
    return path.read_bytes()


def _not_utf8(path: Path) -> DataRoleError:
    """The error for a table that is not UTF-8, naming the first bad byte's line (1 = the header)."""
    data = _open_text_bytes(path)
    try:
        data.decode("utf-8-sig")
        where = ""
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        where = f": byte 0x{data[exc.start]:02x} on line {line} cannot be read"
    return DataRoleError(
        f"table '{path}' is not UTF-8 text{where}. Save it with the UTF-8 encoding (in a spreadsheet: "
        "Save as, 'CSV UTF-8'); fix 'data.table' if it names the wrong file."
    )


def _csv_header(path: Path) -> list[str]:
    import csv
    import io

    data = _open_text_bytes(path)
    first = data.split(b"\n", 1)[0].decode("utf-8-sig", errors="replace")
    return next(csv.reader(io.StringIO(first)), [])


def _refuse_duplicates(path: Path, names: list) -> None:
    seen, dup = set(), []
    for n in names:
        key = str(n)
        if key.strip() and key in seen and key not in dup:
            dup.append(key)
        seen.add(key)
    if dup:
        raise DataRoleError(
            f"table '{path}' has more than one column named {dup}; which one is meant is ambiguous. "
            "Rename or remove the extra column(s) in the table's header."
        )


def read_table(path: str | Path) -> pd.DataFrame:
    """Read a CSV (UTF-8; only an empty field is a missing value) or Parquet table.

    Text such as ``n/a`` is kept as text, so that a numeric column holding it is named as text, with
    its rows, by :func:`check_roles` rather than silently read as a missing value.

    Raises
    ------
    DataRoleError
        If the path is missing or a folder, the file is of another kind, not UTF-8, unreadable or
        empty, or has two columns of the same name.
    """
    if frames.is_memory(path):  # a data frame given to make_study(table=...)
        return frames.frame_of(path)
    path = Path(path)
    if path.is_dir():
        raise DataRoleError(
            f"table '{path}' is a folder, not a file; 'data.table' must name one CSV or Parquet "
            "file (a path relative to the study file)."
        )
    if not path.is_file():
        if path.is_symlink() and not path.exists():
            raise DataRoleError(
                f"table '{path}' is a symbolic link that leads nowhere (its target is missing, or the "
                "link loops); point it at the table, or name the table itself in 'data.table'."
            )
        raise DataRoleError(
            f"table '{path}' does not exist; fix 'data.table' in the study file (a path relative to the study file)."
        )
    suffix = path.suffix.lower()
    is_csv = suffix in (".csv", ".txt") or path.name.lower().endswith(".csv.gz")
    try:
        if suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
        elif is_csv:
            frame = pd.read_csv(path, encoding="utf-8-sig", keep_default_na=False, na_values=[""])
        else:
            raise DataRoleError(f"table '{path}': unknown file kind '{suffix}'; use .csv or .parquet.")
    except DataRoleError:
        raise
    except UnicodeDecodeError:
        raise _not_utf8(path) from None
    except pd.errors.EmptyDataError:
        raise DataRoleError(f"table '{path}' is empty: it has no header and no rows.") from None
    except pd.errors.ParserError as exc:
        raise DataRoleError(
            f"table '{path}' is not a well-formed CSV file ({str(exc).strip()}). Check the separator "
            "(a comma) and the quoting on the line it names."
        ) from None
    except Exception as exc:  # noqa: BLE001 - the Parquet reader raises many kinds of errors
        size = path.stat().st_size
        kind = "Parquet" if not is_csv else "CSV"
        raise DataRoleError(
            f"table '{path}' could not be read as a {kind} file ({size} bytes; "
            f"{type(exc).__name__}: {str(exc).strip()[:200]}). Export it again, or fix 'data.table' "
            "if it names the wrong file."
        ) from None
    _refuse_duplicates(path, _csv_header(path) if is_csv else list(frame.columns))
    if len(frame) == 0:
        raise DataRoleError(
            f"table '{path}' has no rows; the study needs at least one row per jurisdiction, group and period."
        )
    return frame


def _sortable(values: np.ndarray) -> list:
    try:
        return sorted(values.tolist())
    except TypeError:
        return sorted(values.tolist(), key=str)


def _label_kind(v) -> str:
    """'number', 'numeric text' (such as "3"), 'date' or 'text': the kind of one period label."""
    if isinstance(v, (bool, np.bool_)):
        return "text"
    if isinstance(v, (int, float, np.integer, np.floating)):
        return "number"
    if isinstance(v, str):
        try:
            float(v)
            return "numeric text"
        except ValueError:
            return "text"
    if isinstance(v, (pd.Timestamp, np.datetime64)) or hasattr(v, "isoformat"):
        return "date"
    return "text"


def _ordered_without_order(col: str, present: np.ndarray) -> list:
    """Sorted period labels when no period_order is given; refuses labels of mixed kinds."""
    values = present.tolist()
    by_kind: dict[str, list] = {}
    for v in values:
        by_kind.setdefault(_label_kind(v), []).append(v)
    kinds = set(by_kind)
    if kinds <= {"number", "numeric text"} and "numeric text" in kinds:
        return sorted(values, key=float)  # "10" after "9": numbers written as text sort as numbers
    if len(kinds) > 1:
        shown = "; ".join(f"{k} such as {by_kind[k][0]!r}" for k in sorted(kinds))
        raise DataRoleError(
            f"period column '{col}' mixes kinds of labels ({shown}), so their order in time is ambiguous: text "
            "would sort by its characters, after or before the numbers. Make the labels one kind, or list every "
            "period in time order in 'data.period_order' (study file, [data])."
        )
    return _sortable(present)


def period_levels(study: Study, frame: pd.DataFrame) -> list:
    """The period labels in time order: ``data.period_order`` if given, else sorted values.

    Raises
    ------
    DataRoleError
        When the column holds periods that period_order does not list, or, without period_order,
        labels of mixed kinds (numbers and text) whose order in time is ambiguous.
    """
    col = study.columns.period
    present = pd.unique(frame[col])
    if study.period_order is not None:
        order = list(study.period_order)
        as_str = {str(v) for v in order}
        missing = [v for v in present.tolist() if str(v) not in as_str]
        if missing:
            raise DataRoleError(
                f"column '{col}' has period(s) {missing[:5]} that 'data.period_order' does "
                "not list; add them to period_order in time order."
            )
        lookup = {str(v): v for v in present.tolist()}
        return [lookup[str(v)] for v in order if str(v) in lookup]
    return _ordered_without_order(col, present)


def check_roles(study: Study, frame: pd.DataFrame) -> pd.DataFrame:
    """Check the table against the study's column roles; return only the used columns.

    Raises
    ------
    DataRoleError
        Naming the column, the offending value(s) and the fix.
    """
    cols = study.columns
    if len(frame) == 0:
        raise DataRoleError("the table has no rows; the study needs rows for every jurisdiction and period.")
    from .covariates import required_columns

    used = cols.used() + [c for c in required_columns(study.model.covariates) if c not in cols.used()]
    missing_cols = [c for c in used if c not in frame.columns]
    if missing_cols:
        sep = next((c for c in (";", "\t", "|") if len(frame.columns) == 1 and c in str(frame.columns[0])), None)
        hint = (
            f" Its header reads as one column holding {sep!r}: the file seems to separate fields with {sep!r}; "
            "save it with commas as separators (in a spreadsheet: CSV, comma-delimited)."
            if sep
            else ""
        )
        raise DataRoleError(
            f"column(s) {missing_cols} named in the study are not in the table; it has "
            f"{list(frame.columns)[:20]}. Fix the names under [data] or [model] covariates, or the table's header."
            + hint
        )
    out = frame[used].copy()

    for role in ("jurisdiction", "period", "group"):
        c = getattr(cols, role)
        if c is None:
            continue
        nmiss = int(out[c].isna().sum())
        if nmiss:
            raise DataRoleError(
                f"column '{c}' ({role}) has {nmiss} missing value(s); every row needs a "
                f"{role}. Drop or fill those rows."
            )
    covs = required_columns(study.model.covariates)
    roles = {"outcome": cols.outcome, "exposure": cols.exposure, "trials": cols.trials}
    for c in covs:
        role = next((r for r, v in roles.items() if v == c), None)
        if role is not None:
            raise DataRoleError(
                f"'model.covariates' uses column '{c}', which is the {role} column ('data.{role}'); "
                "a covariate must be another column. Fix the formula."
            )
        if c not in cols.used():
            _refuse_mixed_text(out, c)
    yv = _numeric(out, cols.outcome, "outcome")
    nmiss = int(np.isnan(yv).sum())
    if nmiss:
        raise DataRoleError(
            f"outcome column '{cols.outcome}' has {nmiss} missing value(s); drop those "
            "rows or fill them before the analysis."
        )
    if not np.isfinite(yv).all():
        raise DataRoleError(
            f"outcome column '{cols.outcome}' has {int((~np.isfinite(yv)).sum())} infinite "
            "value(s); replace them with finite numbers or drop the rows."
        )
    with np.errstate(over="ignore"):
        big = not np.isfinite(np.sum(yv * yv))
    if big:
        raise DataRoleError(
            f"outcome column '{cols.outcome}' holds values as large as {np.abs(yv).max():g}, whose "
            "sums of squares overflow; rescale the outcome (say to thousands or millions)."
        )
    if study.model.log_outcome and (yv <= 0).any():
        nbad = int((yv <= 0).sum())
        raise DataRoleError(
            f"outcome column '{cols.outcome}' has {nbad} value(s) at or below zero (smallest "
            f"{yv.min():g}), but model.log_outcome = true needs positive values. Set "
            "log_outcome = false, or shift or drop those rows by a rule stated in your protocol."
        )
    out[cols.outcome] = yv

    # Jurisdictions, adopters and their starts.
    jur = out[cols.jurisdiction].astype(str)
    out[cols.jurisdiction] = jur
    known = set(pd.unique(jur).tolist())
    unknown = [a for a, _ in study.policy.adopters if a not in known]
    if unknown:
        raise DataRoleError(
            f"adopter(s) {unknown} in 'policy.adopters' are not values of column "
            f"'{cols.jurisdiction}' (it has e.g. {sorted(known)[:6]}). Fix the names."
        )
    if len(known) - len(study.policy.adopters) < 1:
        raise DataRoleError(
            f"no comparison jurisdiction: every value of '{cols.jurisdiction}' is an adopter. "
            "The design needs jurisdictions that never adopt."
        )
    levels = period_levels(study, out)
    if len(levels) < 2:
        raise DataRoleError(
            f"column '{cols.period}' has a single period ({levels}); the design needs "
            "periods before and after the start."
        )
    as_str = [str(v) for v in levels]
    for a, start in study.policy.adopters:
        if str(start) not in as_str:
            same = [
                v
                for v in levels
                if _label_kind(v) == "number" and _label_kind(start) != "text" and float(v) == float(start)
            ]
            hint = f" Write it as it appears in the table: {same[0]!r}." if same else ""
            raise DataRoleError(
                f"the start of adopter '{a}' ({start!r}, 'policy.adopters') is not a period of column "
                f"'{cols.period}', which runs {levels[0]!r} .. {levels[-1]!r}. Give the first treated period.{hint}"
            )
        if as_str.index(str(start)) == 0:
            raise DataRoleError(
                f"adopter '{a}' starts in the first period ({start!r}): there is no pre-period to compare "
                "with. Add earlier periods or drop this adopter."
            )

    if cols.group is not None:
        grp = out[cols.group].astype(str)
        out[cols.group] = grp
        glev = sorted(pd.unique(grp).tolist())
        if len(glev) < 2:
            raise DataRoleError(
                f"column '{cols.group}' has a single level ({glev}); a DDD needs the target "
                "group and a reference group. Remove 'data.group' for a DiD."
            )
        if len(glev) > 2:
            raise DataRoleError(
                f"column '{cols.group}' has {len(glev)} levels ({glev[:6]}); a DDD here takes "
                "exactly two (target and reference). Recode the column or filter the rows."
            )
        if str(study.policy.target_group) not in glev:
            raise DataRoleError(
                f"target group '{study.policy.target_group}' ('policy.target_group') is not a "
                f"level of column '{cols.group}' (levels {glev})."
            )
    return check_family_inputs(study, out)


def _rows_text(mask: np.ndarray, limit: int = 5) -> str:
    rows = np.flatnonzero(mask)
    shown = ", ".join(str(int(r) + 2) for r in rows[:limit])  # +2: header line and 1-based lines
    return f"{rows.size} row(s) (table lines {shown}{', ...' if rows.size > limit else ''})"


def _text_mask(v: pd.Series) -> np.ndarray:
    """True where a value is present but is not a number (text such as 'n/a', or true/false)."""
    if pd.api.types.is_bool_dtype(v):
        return v.notna().to_numpy()
    if pd.api.types.is_numeric_dtype(v):
        return np.zeros(len(v), dtype=bool)
    conv = pd.to_numeric(v, errors="coerce")
    return (conv.isna() & v.notna()).to_numpy() | v.map(lambda x: isinstance(x, (bool, np.bool_))).to_numpy(bool)


def _text_error(v: pd.Series, mask: np.ndarray, what: str) -> DataRoleError:
    if pd.api.types.is_bool_dtype(v):
        return DataRoleError(
            f"{what} holds true/false values where numbers are expected; give 0 and 1 "
            '(for a yes/no outcome, with model.family = "binomial").'
        )
    examples = list(dict.fromkeys(repr(x) for x in v[mask].head(20).tolist()))[:3]
    return DataRoleError(
        f"{what} holds text where numbers are expected: {_rows_text(mask)} hold {', '.join(examples)}. Give "
        "numbers, with a dot as decimal separator; if the text marks a missing value, leave the field empty "
        "(only an empty field counts as missing)."
    )


def _numeric(out: pd.DataFrame, col: str, role: str) -> np.ndarray:
    """The column as floats; text values are refused, named as text with their first rows."""
    v = out[col]
    mask = _text_mask(v)
    if mask.any():
        raise _text_error(v, mask, f"{role} column '{col}'")
    if not pd.api.types.is_numeric_dtype(v) or pd.api.types.is_bool_dtype(v):
        v = pd.to_numeric(v, errors="coerce")
    return v.to_numpy(dtype=float, na_value=np.nan)


def _refuse_mixed_text(out: pd.DataFrame, col: str) -> None:
    """A covariate column of numbers with some text in it (such as 'n/a') is refused; all-text is a category."""
    v = out[col]
    if pd.api.types.is_numeric_dtype(v) and not pd.api.types.is_bool_dtype(v):
        return
    mask = _text_mask(v)
    numbers_present = bool((~mask & v.notna().to_numpy()).any())
    if mask.any() and numbers_present:
        raise _text_error(v, mask, f"covariate column '{col}' mixes numbers and text: it")


def check_family_inputs(study: Study, out: pd.DataFrame) -> pd.DataFrame:
    """Checks that depend on the outcome family, the exposure and trials columns and the covariates.

    Binomial: a 0/1 outcome, or whole-number successes with a trials column and successes <= trials.
    Poisson and negbinomial: whole-number, non-negative counts. Exposure: present, finite and
    positive. Covariates: no missing values, unless ``model.missing = "drop"``, which drops those
    rows and records their count in ``out.attrs["dropped_rows"]``.

    Raises
    ------
    DataRoleError
        Naming the column, how many rows and which table lines are at fault, and the fix.
    """
    cols, fam = study.columns, study.model.family
    rec = family_record(fam)
    y = out[cols.outcome].to_numpy(dtype=float)
    if rec.size_role == "trials" and cols.trials is None:
        bad = (y != 0) & (y != 1)
        if bad.any():
            raise DataRoleError(
                f"outcome column '{cols.outcome}' must be 0 or 1 for family '{fam}' without a trials column; "
                f"{_rows_text(bad)} hold other values (e.g. {sorted(set(y[bad].tolist()))[:3]}). Recode it to 0/1, "
                "or give aggregated data with successes in the outcome and 'data.trials' naming the trials column."
            )
    if not rec.cell_model and not (rec.size_role == "trials" and cols.trials is None):
        what = rec.outcome_word
        neg = y < 0
        if neg.any():
            raise DataRoleError(
                f"outcome column '{cols.outcome}' holds {what} for family '{fam}' but "
                f"{_rows_text(neg)} are negative (smallest {y.min():g}). Counts cannot be negative; "
                "fix or drop those rows."
            )
        frac = y != np.round(y)
        if frac.any():
            raise DataRoleError(
                f"outcome column '{cols.outcome}' holds {what} for family '{fam}' but "
                f"{_rows_text(frac)} are not whole numbers (e.g. {y[frac][0]:g}). Give whole "
                "numbers, or use family 'gaussian' for a continuous outcome."
            )
    if rec.size_role == "trials" and cols.trials is not None:
        tr = _numeric(out, cols.trials, "trials")
        miss = ~np.isfinite(tr)
        if miss.any():
            raise DataRoleError(
                f"trials column '{cols.trials}' has {_rows_text(miss)} missing or infinite; every "
                "row needs its number of trials. Fill or drop those rows."
            )
        if (tr != np.round(tr)).any() or (tr < 1).any():
            bad = (tr != np.round(tr)) | (tr < 1)
            raise DataRoleError(
                f"trials column '{cols.trials}' must hold whole numbers of at least 1; "
                f"{_rows_text(bad)} do not (e.g. {tr[bad][0]:g})."
            )
        below = tr < y
        if below.any():
            i = int(np.flatnonzero(below)[0])
            raise DataRoleError(
                f"trials column '{cols.trials}' is below the successes in '{cols.outcome}' in "
                f"{_rows_text(below)} (first: {y[i]:g} successes of {tr[i]:g} trials). "
                "Successes cannot exceed trials; check which column is which."
            )
        out[cols.trials] = tr
    if rec.size_role == "exposure" and cols.exposure is not None:
        ex = _numeric(out, cols.exposure, "exposure")
        miss = ~np.isfinite(ex)
        if miss.any():
            raise DataRoleError(
                f"exposure column '{cols.exposure}' has {_rows_text(miss)} missing or infinite; "
                "every row needs its person-time. Fill or drop those rows."
            )
        nonpos = ex <= 0
        if nonpos.any():
            raise DataRoleError(
                f"exposure column '{cols.exposure}' must be positive (person-time); "
                f"{_rows_text(nonpos)} are zero or negative (smallest {ex.min():g}). "
                "Drop rows with no person-time, or fix the values."
            )
        out[cols.exposure] = ex

    from .covariates import required_columns

    covs = required_columns(study.model.covariates)
    if covs:
        na = {c: int(out[c].isna().sum()) for c in covs}
        na = {c: k for c, k in na.items() if k}
        if na:
            mask = out[covs].isna().any(axis=1).to_numpy()
            if study.model.missing != "drop":
                col, k = next(iter(na.items()))
                raise DataRoleError(
                    f"covariate column '{col}' has {k} missing value(s) ({_rows_text(out[col].isna().to_numpy())})"
                    + (f"; other covariates with missing values: {dict(list(na.items())[1:])}" if len(na) > 1 else "")
                    + '. Fill them, or set model.missing = "drop" to drop the rows with a missing covariate '
                    "(the count is reported)."
                )
            out = out.loc[~mask].copy()
            out.attrs["dropped_rows"] = {
                "count": int(mask.sum()),
                "by_column": na,
                "reason": "missing covariate value (model.missing = 'drop')",
            }
            if len(out) == 0:
                raise DataRoleError("every row has a missing covariate value; model.missing = 'drop' leaves no rows.")
    return out
