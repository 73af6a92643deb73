"""The data section: the cells and each adopter's raw gap or outcome against the comparisons."""

from __future__ import annotations

import warnings

import numpy as np

from .. import plots
from ..pieces import _absent, _img, _num, _table, esc
from ..reader import FIT_COMMAND, RunFolder
from ..words import names


def _data_section(run: RunFolder) -> str:
    d = run.summary["data"]
    cols = ((run.manifest or {}).get("study") or {}).get("data") or {}
    rows = [
        ["rows in the table", _num(d.get("rows"))],
        ["cells (jurisdiction × group × period)", _num(d.get("cells"))],
        ["jurisdictions", _num(d.get("jurisdictions"))],
        ["periods", _num(d.get("periods"))],
        ["groups (reference first, target last)", ", ".join(map(str, d.get("groups", [])))],
        ["design", d.get("design", "")],
        ["adopting jurisdictions", _num(len(d.get("adopters", [])))],
    ]
    for role in ("outcome", "jurisdiction", "period", "group", "unit", "exposure", "trials"):
        if cols.get(role):
            rows.append([f"{role} column", cols[role]])
    m = run.summary.get("model") or {}
    if m:
        rows.append(
            [
                "model",
                f"{m.get('family', '')}{', log outcome' if m.get('log_outcome') else ''}; {m.get('likelihood', '')}",
            ]
        )
    out = [_table(["item", "value"], rows)]
    starts = d.get("starts") or {}
    if starts:
        out.append("<h3>Adopters and their first treated period</h3>")
        out.append(_table(["adopting jurisdiction", "first treated period"], [[k, v] for k, v in starts.items()]))
    out.extend(_raw_paths(run))
    for n in run.summary.get("notes") or []:
        out.append(f'<p class="note">{esc(n)}</p>')
    return "\n".join(out)


#: at most this many adopters get a panel of their own in the raw-data figure
RAW_PANELS = 6


def _raw_paths(run: RunFolder) -> list[str]:
    """The raw gap (DDD) or outcome (DiD) of each adopter over all periods against the comparison
    jurisdictions' mean and 10-90% band, from the cell means in posterior.nc."""
    c = run.cell_means()
    if c is None:
        return [
            _absent("the cell means (posterior.nc is missing), so the raw-data figure cannot be drawn.", FIT_COMMAND)
        ]
    mean, start = c["mean"], c["start"]
    T = mean.shape[2]
    ddd = mean.shape[1] == 2
    path = mean[:, 1, :] - mean[:, 0, :] if ddd else mean[:, 0, :]
    comp = start >= T
    adopters = [int(j) for j in np.flatnonzero(~comp)]
    if not comp.any() or not adopters:
        return []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a period where no comparison has rows
        cm = np.nanmean(path[comp], axis=0)
        lo, hi = np.nanpercentile(path[comp], [10, 90], axis=0)
    series = [
        {
            "label": c["jurisdictions"][j],
            "observed": path[j],
            "mean": cm,
            "lower": lo,
            "upper": hi,
            "start": int(start[j]),
        }
        for j in adopters[:RAW_PANELS]
    ]
    nm = names((run.manifest or {}).get("study"))
    log = bool((run.summary.get("model") or {}).get("log_outcome"))
    what = f"log {nm['outcome']}" if log else nm["outcome"]
    if ddd:
        grp = c["groups"]
        ylabel = f"{what}: {grp[1]} minus {grp[0]}"
    else:
        ylabel = what
    out = [
        "<h3>The raw data</h3>",
        _img(
            plots.raw_path_figure(series, xlabel="period", ylabel=ylabel, xticks=c["periods"]),
            "Each adopter's observed path against the comparison jurisdictions' mean and band",
        ),
    ]
    more = len(adopters) - RAW_PANELS
    out.append(
        '<p class="caption">Observed cell means, before any model: '
        + ("the gap between the target and the reference group" if ddd else "the outcome")
        + " in each adopting jurisdiction (orange) against the mean (dashed) and the 10-90% range (band) "
        "of the comparison jurisdictions; the dotted line marks the policy start. Levels may differ; "
        "what the analysis relies on is that the paths move alike before the start."
        + (f" {more} more adopting jurisdiction(s) are not drawn." if more > 0 else "")
        + "</p>"
    )
    return out
