"""Batch sweeps: a base study plus variants, run in-process, on a local process pool or on Dask.

The sweep file (TOML) names a base study and the variants to run against it::

    study = "../copay_cap/study.toml"   # base study, relative to this file
    combine = "one_at_a_time"           # or "grid": every combination of the axes below

    [sampler]                           # applied to every variant (chains, draws, tune, seed)
    draws = 500

    [priors]                            # a grid over prior scales: each key a list of scales
    effect = [0.05, 0.5]
    gap_noise = [0.1, 0.3]

    [comparisons]                       # comparison jurisdictions left out of the likelihood
    leave_each_out = true
    drop = [["Aldmoor", "Brisk Hollow"]]

    [covariates]
    formulas = ["", "age"]              # "" = no covariates

    [outcomes]
    columns = ["oop_spend"]

    [[options]]                         # model options of one variant each
    log_outcome = false

    [[variant]]                         # hand-written variants (placebo assignments, anything)
    label = "placebo: Ormsby from 2024Q1"
    policy = { adopters = { "Ormsby" = "2024Q1" } }

With ``combine = "one_at_a_time"`` (the default) each axis varies alone around the base study (the
points of the prior grid are one axis); ``"grid"`` crosses every axis. The base study itself is
always the first variant, labelled ``base``.

Each variant gets a stable id, the first 12 hex digits of the SHA-256 of its resolved study (in
study-file layout), its dropped jurisdictions, the base seed, the data file's SHA-256 and the
bayesdid version; its sampler seed derives from the base seed and that content hash. Variants that
share a model structure share one compiled model per worker (the cache in :mod:`bayesdid.sample`);
leaving comparison jurisdictions out gives their jurisdiction-periods weight 0 in the likelihood,
so the structure does not change.

Results in ``DIR``::

    variants/<id>/        one run folder per variant (posterior.nc, summary.json, manifest.json,
                          variant.json), written under .staging/ and renamed into place when complete
    summary.csv           one row per variant (see :data:`SUMMARY_COLUMNS`)
    manifest.json         versions, the sweep file and its hash, the base study, the executor, every
                          variant with its status, seed, folder or error, compiles per worker
    verdict.json          :func:`verdict` of the finished variants (read by the HTML report)

A rerun skips every variant whose folder is complete (variant.json names the id, the JSON files
load, posterior.nc opens) and runs only the missing, broken or failed ones. A failing variant is
recorded with its error and does not stop the others.
"""

from __future__ import annotations

import copy
import csv
import hashlib
import io
import itertools
import json
import os
import shutil
import sys
import time
import tomllib
import uuid
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from .contracts import SWEEP_SUMMARY_COLUMNS, SweepVerdict, run_id
from .errors import BayesDidError, SweepError
from .lifeline import workers_end_with_me
from .model.registry import study_priors
from .outputs import owner_alive, owner_tag, probe_writable, process_start
from .study import PRIOR_NAMES, Study, _parse, load_study, study_to_dict
from .version import __version__

__all__ = [
    "Variant",
    "SweepPlan",
    "load_sweep",
    "run_sweep",
    "verdict",
    "SUMMARY_COLUMNS",
    "variant_is_complete",
    "read_results",
]

_TOP = {"study", "title", "combine", "sampler", "priors", "comparisons", "covariates", "outcomes", "options", "variant"}
_OPTION_KEYS = {"label", "family", "log_outcome", "missing", "threshold"}
_VARIANT_KEYS = {"label", "priors", "model", "policy", "outcome", "drop", "threshold"}

#: Columns of DIR/summary.csv, in order (declared in :mod:`bayesdid.contracts`). Effect figures are the
#: ATT on the model scale (log units for a log outcome); ``pct_*`` are the percent change exp(ATT) - 1
#: when the outcome is logged.
SUMMARY_COLUMNS = list(SWEEP_SUMMARY_COLUMNS)


def _err(key: str, value: Any, expected: str, fix: str = "") -> SweepError:
    msg = f"sweep key '{key}': expected {expected}, found {value!r}."
    return SweepError(msg + (f" {fix}" if fix else ""))


# ---- variants ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class Variant:
    """One variant: its overrides of the base study, in study-file layout, and what they resolve to.

    ``overrides`` keys: ``priors`` {name: scale}, ``model`` {family, log_outcome, covariates,
    missing}, ``data`` {outcome}, ``policy`` {adopters, target_group}, ``decision`` {threshold},
    ``drop`` [comparison jurisdictions left out].
    """

    label: str
    overrides: dict
    id: str = ""
    seed: int = 0
    raw: dict = field(default_factory=dict, repr=False)  # the resolved study, study-file layout


def _merge(raw: dict, overrides: Mapping) -> dict:
    out = copy.deepcopy(raw)
    for sec, vals in overrides.items():
        if sec == "drop":
            continue
        if sec == "policy":  # an adopter map replaces the base one (placebo assignments)
            out.setdefault("policy", {}).update(copy.deepcopy(dict(vals)))
        else:
            out.setdefault(sec, {}).update(copy.deepcopy(dict(vals)))
        if sec == "model" and vals.get("covariates", "missing") in ("", None):
            out["model"].pop("covariates", None)
    return out


def _plain_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str)


def variant_id(raw: dict, drop: list, base_seed: int, data_sha: str) -> str:
    """sha256(resolved study without title and seed, dropped jurisdictions, base seed, data hash,
    bayesdid version)[:12]."""
    content = copy.deepcopy(raw)
    content.pop("title", None)
    content.get("sampler", {}).pop("seed", None)
    blob = _plain_json(
        {
            "study": content,
            "drop": sorted(drop),
            "base_seed": int(base_seed),
            "data_sha256": data_sha,
            "bayesdid": __version__,
        }
    )
    return hashlib.sha256(blob.encode()).hexdigest()[:12]


def derived_seed(base_seed: int, vid: str) -> int:
    """The variant's sampler seed: first 4 bytes of sha256("<base seed>/<id>"), below 2**31."""
    h = hashlib.sha256(f"{int(base_seed)}/{vid}".encode()).digest()
    return int.from_bytes(h[:4], "big") % (2**31)


def _label(overrides: Mapping) -> str:
    parts = []
    for sec in sorted(overrides):
        vals = overrides[sec]
        if sec == "drop":
            parts.append("drop=" + "+".join(vals))
        elif sec == "label":
            continue
        else:
            for k in sorted(vals):
                v = vals[k]
                parts.append(f"{sec}.{k}={_plain_json(v) if isinstance(v, (dict, list)) else v}")
    return ", ".join(parts) or "base"


@dataclass
class SweepPlan:
    """A validated sweep: the base study and its variants, in run order (base first)."""

    path: Path
    base: Study
    variants: list
    combine: str
    title: str
    sha256: str
    data_sha256: dict

    def describe(self) -> dict:
        return {
            "sweep_file": str(self.path),
            "sweep_sha256": self.sha256,
            "combine": self.combine,
            "title": self.title,
            "variants": len(self.variants),
        }


def _list_of(v, key, check, expected):
    if not isinstance(v, list) or not v:
        raise _err(key, v, f"a non-empty list of {expected}")
    for x in v:
        if not check(x):
            raise _err(key, v, f"a list of {expected}", f"The item {x!r} is not one.")
    return v


def _axes(raw: Mapping, comparisons: list[str], adopters: set[str]) -> list[list[dict]]:
    """Each axis: a list of override dicts (one per value)."""
    axes = []
    pri = raw.get("priors", {})
    if not isinstance(pri, Mapping):
        raise _err("priors", pri, "a table of prior name = [scales]")
    unknown = sorted(set(pri) - set(PRIOR_NAMES))
    if unknown:
        raise SweepError(f"unknown prior name(s) {unknown} in [priors]; allowed names are {sorted(PRIOR_NAMES)}.")
    if pri:
        names = sorted(pri)
        for n in names:
            _list_of(
                pri[n],
                f"priors.{n}",
                lambda x: isinstance(x, (int, float)) and not isinstance(x, bool) and x > 0 and np.isfinite(x),
                "positive numbers (prior scales on the model scale)",
            )
        axes.append(
            [
                {"priors": {n: float(v) for n, v in zip(names, combo)}}
                for combo in itertools.product(*(pri[n] for n in names))
            ]
        )
    comp = raw.get("comparisons", {})
    if not isinstance(comp, Mapping):
        raise _err("comparisons", comp, "a table with 'leave_each_out' and/or 'drop'")
    bad = sorted(set(comp) - {"leave_each_out", "drop"})
    if bad:
        raise SweepError(f"unknown key(s) {bad} in [comparisons]; allowed keys are ['drop', 'leave_each_out'].")
    drops = []
    loo = comp.get("leave_each_out", False)
    if not isinstance(loo, bool):
        raise _err("comparisons.leave_each_out", loo, "true or false")
    if loo:
        drops += [[c] for c in comparisons]
    if "drop" in comp:
        for i, sub in enumerate(
            _list_of(
                comp["drop"],
                "comparisons.drop",
                lambda x: isinstance(x, list) and x,
                "non-empty lists of comparison jurisdictions",
            )
        ):
            for c in sub:
                if c in adopters:
                    raise _err(
                        f"comparisons.drop[{i}]",
                        c,
                        "a comparison jurisdiction",
                        f"'{c}' adopts the policy; only comparison jurisdictions can be left out.",
                    )
                if c not in comparisons:
                    raise _err(
                        f"comparisons.drop[{i}]", c, f"a jurisdiction of the table (one of {comparisons[:6]}...)"
                    )
            drops.append(sorted(str(c) for c in sub))
    if drops:
        axes.append([{"drop": d} for d in drops])
    cov = raw.get("covariates", {})
    if cov:
        if not isinstance(cov, Mapping) or set(cov) - {"formulas"}:
            raise SweepError("[covariates] takes one key, 'formulas': a list of covariate formulas ('' for none).")
        forms = _list_of(cov.get("formulas"), "covariates.formulas", lambda x: isinstance(x, str), "strings")
        axes.append([{"model": {"covariates": f}} for f in forms])
    outc = raw.get("outcomes", {})
    if outc:
        if not isinstance(outc, Mapping) or set(outc) - {"columns"}:
            raise SweepError("[outcomes] takes one key, 'columns': a list of outcome column names.")
        cols = _list_of(outc.get("columns"), "outcomes.columns", lambda x: isinstance(x, str) and x, "column names")
        axes.append([{"data": {"outcome": c}} for c in cols])
    opts = raw.get("options", [])
    if opts:
        if not isinstance(opts, list):
            raise _err("options", opts, "an array of tables ([[options]])")
        ax = []
        for i, o in enumerate(opts):
            bad = sorted(set(o) - _OPTION_KEYS)
            if bad:
                raise SweepError(
                    f"unknown key(s) {bad} in [[options]] number {i + 1}; allowed keys are {sorted(_OPTION_KEYS)}."
                )
            ov: dict = {}
            m = {k: o[k] for k in ("family", "log_outcome", "missing") if k in o}
            if m:
                ov["model"] = m
            if "threshold" in o:
                ov["decision"] = {"threshold": o["threshold"]}
            if not ov:
                raise SweepError(
                    f"[[options]] number {i + 1} changes nothing; give at least one of "
                    f"{sorted(_OPTION_KEYS - {'label'})}."
                )
            if "label" in o:
                ov["label"] = str(o["label"])
            ax.append(ov)
        axes.append(ax)
    return axes


def _explicit(raw: Mapping, adopters: set[str], comparisons: list[str]) -> list[dict]:
    out = []
    vs = raw.get("variant", [])
    if not isinstance(vs, list):
        raise _err("variant", vs, "an array of tables ([[variant]])")
    for i, v in enumerate(vs):
        bad = sorted(set(v) - _VARIANT_KEYS)
        if bad:
            raise SweepError(
                f"unknown key(s) {bad} in [[variant]] number {i + 1}; allowed keys are {sorted(_VARIANT_KEYS)}."
            )
        ov: dict = {}
        for sec in ("priors", "model", "policy"):
            if sec in v:
                if not isinstance(v[sec], Mapping):
                    raise _err(f"variant[{i}].{sec}", v[sec], "a table")
                ov[sec] = dict(v[sec])
        if "outcome" in v:
            ov["data"] = {"outcome": v["outcome"]}
        if "threshold" in v:
            ov["decision"] = {"threshold": v["threshold"]}
        if "drop" in v:
            d = _list_of(v["drop"], f"variant[{i}].drop", lambda x: isinstance(x, str), "jurisdiction names")
            for c in d:
                if c not in comparisons:
                    raise _err(f"variant[{i}].drop", c, "a comparison jurisdiction of the table")
            ov["drop"] = sorted(d)
        if "label" in v:
            ov["label"] = str(v["label"])
        out.append(ov)
    return out


def _combine(axes: list[list[dict]], mode: str) -> list[dict]:
    if mode == "one_at_a_time":
        return [ov for ax in axes for ov in ax]
    combos = []
    for parts in itertools.product(*axes):
        ov: dict = {}
        labels = []
        for p in parts:
            for k, v in p.items():
                if k == "label":
                    labels.append(v)
                elif k == "drop":
                    ov["drop"] = sorted(set(ov.get("drop", [])) | set(v))
                else:
                    ov.setdefault(k, {}).update(v)
        if labels:
            ov["label"] = " + ".join(labels)
        combos.append(ov)
    return combos


def load_sweep(path: str | Path) -> SweepPlan:
    """Read and validate a sweep file; resolve every variant (study, id, seed).

    Raises
    ------
    SweepError
        For a missing or malformed sweep file, unknown keys (with the allowed list), bad values
        (naming the key), or a variant whose study does not validate (naming the variant).
    StudyError, DataRoleError
        From the base study and its table.
    """
    from .data import file_sha256, read_table

    path = Path(path)
    if not path.is_file():
        raise SweepError(f"sweep file '{path}' does not exist; give the path to a .toml sweep file.")
    text = path.read_text(encoding="utf-8")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SweepError(f"sweep file '{path}' is not valid TOML: {exc}. Fix the line it names.") from None
    unknown = sorted(set(raw) - _TOP)
    if unknown:
        raise SweepError(f"unknown key(s) {unknown} at the top of the sweep file; allowed keys are {sorted(_TOP)}.")
    if not isinstance(raw.get("study"), str):
        raise _err("study", raw.get("study"), "the path of the base study file (relative to the sweep file)")
    sp = Path(raw["study"])
    sp = sp if sp.is_absolute() else (path.parent / sp)
    base = load_study(sp)
    combine = raw.get("combine", "one_at_a_time")
    if combine not in ("one_at_a_time", "grid"):
        raise _err("combine", combine, "'one_at_a_time' or 'grid'")
    samp = raw.get("sampler", {})
    if not isinstance(samp, Mapping) or set(samp) - {"chains", "draws", "tune", "seed"}:
        raise SweepError(
            "[sampler] in a sweep file takes chains, draws, tune and seed only; found "
            f"{sorted(samp) if isinstance(samp, Mapping) else samp!r}."
        )
    if samp:
        base = base.replace(sampler=dict(samp))
    base_raw = study_to_dict(base)
    base_dir = sp.parent.resolve()

    frame = read_table(base.table)
    jcol = base.columns.jurisdiction
    adopters = {a for a, _ in base.policy.adopters}
    comparisons = sorted(str(j) for j in frame[jcol].astype(str).unique() if str(j) not in adopters)
    del frame
    overrides = [{}] + _combine(_axes(raw, comparisons, adopters), combine) + _explicit(raw, adopters, comparisons)

    shas: dict[str, str] = {}
    variants, seen = [], {}
    for ov in overrides:
        label = ov.get("label") or _label(ov)
        ov = {k: v for k, v in ov.items() if k != "label"}
        merged = _merge(base_raw, ov)
        try:
            st = _parse(merged, base_dir)
        except BayesDidError as exc:
            raise SweepError(f"variant '{label}' does not make a valid study: {exc}") from None
        lacks = sorted(set(ov.get("priors") or {}) - set(study_priors(st)))
        if lacks:
            raise SweepError(
                f"variant '{label}' sets the prior(s) {lacks}, which the model of this study does not have "
                f"(family {st.model.family}, {'DDD' if st.columns.group else 'DiD'}, "
                f"{len(st.policy.adopters)} adopter(s), {'with' if st.model.covariates else 'no'} covariates): "
                f"sweeping it would change nothing. Its priors are {list(study_priors(st))}."
            )
        tbl = str(st.table)
        if tbl not in shas:
            shas[tbl] = file_sha256(st.table)
        resolved = study_to_dict(st)
        vid = variant_id(resolved, ov.get("drop", []), base.sampler.seed, shas[tbl])
        if vid in seen:  # the same content twice (say a grid point equal to the base): run it once
            continue
        seen[vid] = label
        seed = derived_seed(base.sampler.seed, vid)
        resolved["sampler"]["seed"] = seed
        variants.append(Variant(label=label, overrides=ov, id=vid, seed=seed, raw=resolved))
    title = raw.get("title", f"sweep of {base.title}")
    return SweepPlan(
        path=path.resolve(),
        base=base,
        variants=variants,
        combine=combine,
        title=str(title),
        sha256=hashlib.sha256(text.encode()).hexdigest(),
        data_sha256=shas,
    )


# ---- one variant (runs in a worker) ----------------------------------------------------------
_CELLS: dict = {}


def _cells_for(study: Study):
    """Collapse once per worker per (table, roles, outcome, options); the frame read once per table."""
    from .cells import collapse
    from .data import read_table

    key = _plain_json({k: v for k, v in study_to_dict(study).items() if k in ("data", "policy", "model")})
    if key not in _CELLS:
        fkey = ("frame", str(study.table))
        if fkey not in _CELLS:
            _CELLS[fkey] = read_table(study.table)
        _CELLS[key] = collapse(study, _CELLS[fkey])
    return _CELLS[key]


def run_variant(task: dict) -> dict:
    """Fit one variant and write its folder; return a record (never raises).

    ``task``: id, label, raw (resolved study), base_dir, drop, folder, staging, data_sha256.
    The folder is written under ``staging`` (atomically, by :func:`bayesdid.run.write_run`), gets its
    ``variant.json`` last, and is renamed to ``folder`` only when complete.
    """
    from . import sample
    from .crosscheck import least_squares_estimate
    from .run import analyse, dump_json, write_run

    t0 = time.perf_counter()
    before, loads_before = sample.COMPILES["count"], sample.LOADS["count"]
    rec = {"id": task["id"], "label": task["label"], "pid": os.getpid()}
    try:
        study = _parse(task["raw"], Path(task["base_dir"]))
        cells = _cells_for(study)
        base_cells = cells
        drop = task.get("drop") or []
        if drop:
            idx = [cells.jurisdictions.index(c) for c in drop]
            w = cells.jt_weight().copy()
            w[idx, :] = 0.0
            cells = cells.with_weight(w)
        ls_key = ("least_squares", id(base_cells), tuple(drop))
        if ls_key not in _CELLS:  # the cross-check depends on the cells only: once per data set
            lcells = cells
            if drop:
                keep = np.ones(cells.shape, dtype=bool)
                keep[idx] = False
                lcells = replace(
                    cells,
                    n=cells.n * keep,
                    sum_y=cells.sum_y * keep,
                    sum_y2=cells.sum_y2 * keep,
                    ss=cells.ss * keep,
                    weight=None,
                )
            _CELLS[ls_key] = least_squares_estimate(lcells)
        an = analyse(study, cells=cells, least_squares=_CELLS[ls_key])
        an.data_sha256 = task["data_sha256"]
        if drop:
            an.notes.append(
                f"comparison jurisdiction(s) left out (weight 0 in the likelihood, removed from "
                f"the least-squares cross-check): {', '.join(drop)}"
            )
        staging = Path(task["staging"])
        if staging.exists():
            shutil.rmtree(staging)
        write_run(an, staging, argv=["bayesdid", "sweep", task["id"]])
        info = {
            "id": task["id"],
            "label": task["label"],
            "overrides": task["overrides"],
            "seed": task["seed"],
            "status": "done",
            "bayesdid": __version__,
            "pid": os.getpid(),
            "compiles_in_this_run": sample.COMPILES["count"] - before,
            "seconds": time.perf_counter() - t0,
        }
        dump_json(info, staging / "variant.json")
        folder = Path(task["folder"])
        if folder.exists():  # a broken earlier copy: swap it out only now that the new one is complete
            shutil.rmtree(folder)
        os.replace(staging, folder)
        rec.update(status="done", seconds=info["seconds"])
    except Exception as exc:  # recorded; one failing variant does not stop the others
        rec.update(status="failed", error=f"{type(exc).__name__}: {exc}", seconds=time.perf_counter() - t0)
    rec["compiles"] = sample.COMPILES["count"] - before
    rec["compiles_total"] = sample.COMPILES["count"]
    rec["loads"] = sample.LOADS["count"] - loads_before  # from the compile cache on disk
    return rec


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


def _row(v: Variant, status: str, summary: dict | None, error: str = "") -> dict:
    row = {c: "" for c in SUMMARY_COLUMNS}
    row.update(id=v.id, label=v.label, status=status, overrides=_plain_json(v.overrides), seed=v.seed, error=error)
    if summary:
        e = summary["effect"]
        row.update(
            effect_mean=e["mean"],
            effect_sd=e["sd"],
            eti90_low=e["eti_90"][0],
            eti90_high=e["eti_90"][1],
            eti95_low=e["eti_95"][0],
            eti95_high=e["eti_95"][1],
            hdi90_low=e["hdi_90"][0],
            hdi90_high=e["hdi_90"][1],
            prob_gt_0=e["prob_gt_0"],
            prob_lt_0=e["prob_lt_0"],
            threshold=e["threshold"] if e["threshold"] is not None else "",
            prob_beyond_threshold=e["prob_beyond_threshold"] if e["prob_beyond_threshold"] is not None else "",
        )
        if "effect_percent" in summary:
            p = summary["effect_percent"]
            row.update(pct_mean=p["mean"], pct_eti90_low=p["eti_90"][0], pct_eti90_high=p["eti_90"][1])
        d = summary["diagnostics"]
        row.update(
            diagnostics_ok=d["ok"],
            rhat_max=d["rhat_max"],
            ess_bulk_min=d["ess_bulk_min"],
            divergences=d["divergences"],
            sample_s=summary["timing"].get("sample_s", ""),
        )
        if "sensitivity" in summary:
            row["sensitivity_ok"] = summary["sensitivity"].get("ok")
    return row


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


def _atomic_write(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def _write_tables(out: Path, plan: SweepPlan, rows: list[dict], meta: dict) -> dict:
    from .run import versions

    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=SUMMARY_COLUMNS, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow(r)
    _atomic_write(out / "summary.csv", buf.getvalue())
    ver = verdict(rows)
    typed = SweepVerdict.from_dict(ver, what="the sweep's verdict")  # the contract the report reads
    _atomic_write(out / "verdict.json", json.dumps(typed.to_dict(), indent=2, default=str) + "\n")
    by_id = {r["id"]: r for r in rows}
    manifest = {
        "bayesdid": __version__,
        "kind": "bayesdid sweep",
        "updated": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        **plan.describe(),
        "base_study": study_to_dict(plan.base),
        "base_seed": plan.base.sampler.seed,
        "data_sha256": plan.data_sha256,
        "base_data_sha256": plan.data_sha256.get(str(plan.base.table)),
        "run_id": run_id(plan.data_sha256.get(str(plan.base.table)), study_to_dict(plan.base)),
        "versions": versions(),
        **meta,
        "variants": [
            {
                "id": v.id,
                "label": v.label,
                "overrides": v.overrides,
                "seed": v.seed,
                "status": by_id[v.id]["status"],
                "folder": f"variants/{v.id}",
                **({"error": by_id[v.id]["error"]} if by_id[v.id]["error"] else {}),
            }
            for v in plan.variants
        ],
        "files": ["summary.csv", "manifest.json", "verdict.json", "variants/"],
    }
    _atomic_write(out / "manifest.json", json.dumps(manifest, indent=2, default=str) + "\n")
    return ver


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


def _bind_to_parent(parent_pid: int) -> None:
    """Pool-worker initializer: the worker ends when the sweep's main process does, however it ends
    (:func:`bayesdid.lifeline.bind_to_parent`)."""
    from .lifeline import bind_to_parent

    bind_to_parent(parent_pid)


# ---- executors ---------------------------------------------------------------------------------
def _variant_lost(task: dict, exc: BaseException) -> dict:
    return {
        "id": task["id"],
        "label": task["label"],
        "pid": "lost",
        "status": "failed",
        "compiles": 0,
        "error": f"the worker running this variant stopped: {type(exc).__name__}: {exc}",
    }


def _result_or_failure(future, task, lost=_variant_lost) -> dict:
    """The worker's record, or a failure record when the worker itself died (killed, out of memory)."""
    try:
        return future.result()
    except Exception as exc:
        return lost(task, exc)


# Each executor maps ``fn`` (default: one sweep variant) over picklable tasks and yields the records
# as they complete; ``lost(task, exc)`` makes the record of a task whose worker died. The calibration
# study runs its reps through the same executors (``bayesdid.calibration.make_executor``).
def _serial(tasks: list, workers: int, cluster, *, fn=None, lost=_variant_lost):
    fn = fn or run_variant
    for t in tasks:
        yield fn(t)


def _pool(tasks: list, workers: int, cluster, *, fn=None, lost=_variant_lost):
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor, as_completed

    fn = fn or run_variant
    # spawn: a clean interpreter per worker (no forked numba/LLVM state); each worker compiles once
    # each worker ends with this process, even when it is killed (_bind_to_parent)
    with ProcessPoolExecutor(
        max_workers=workers, mp_context=mp.get_context("spawn"), initializer=_bind_to_parent, initargs=(os.getpid(),)
    ) as ex:
        with workers_end_with_me():  # the workers start in submit; they arm the signal while importing
            futs = {ex.submit(fn, t): t for t in tasks}
        for f in as_completed(futs):
            yield _result_or_failure(f, futs[f], lost)


def _dask(tasks: list, workers: int, cluster, *, fn=None, lost=_variant_lost):
    from distributed import Client, LocalCluster, as_completed

    from .on_dask import EndWithSweep, on_dask

    fn = fn or run_variant
    local = None
    if cluster == "local":
        with workers_end_with_me():  # the workers start here; they arm the signal while importing
            local = LocalCluster(
                n_workers=workers,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
                silence_logs=40,
            )
        client = Client(local)
        client.register_plugin(EndWithSweep(os.getpid()))
    else:
        try:
            client = Client(cluster, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise SweepError(
                f"cannot reach the Dask scheduler at --cluster '{cluster}': {exc}. Start one "
                "(dask scheduler) or use --cluster local."
            ) from None
    try:
        token = uuid.uuid4().hex[:8]  # a fresh key per run: a scheduler never hands back an old result
        life = {"owner": owner_tag(), "start": process_start(os.getpid())}
        futs = {
            client.submit(on_dask, fn, t, life, pure=False, key=f"bayesdid-{_task_key(t, i)}-{token}"): t
            for i, t in enumerate(tasks)
        }
        for f in as_completed(list(futs)):
            yield _result_or_failure(f, futs[f], lost)
    finally:
        client.close()
        if local is not None:
            local.close()


def _task_key(task, i: int) -> str:
    return f"variant-{task['id']}" if isinstance(task, dict) and "id" in task else f"task-{i}"


EXECUTORS: dict[str, Callable] = {"serial": _serial, "pool": _pool, "dask": _dask}


class _Progress:
    def __init__(self, total: int, skipped: int, enabled: bool, stream=None):
        self.total, self.done, self.failed, self.skipped = total, 0, 0, skipped
        self.enabled, self.stream = enabled, stream or sys.stderr
        self.t0 = time.perf_counter()
        self._draw()

    def step(self, rec: dict):
        self.done += 1
        self.failed += rec.get("status") == "failed"
        self._draw()

    def _draw(self):
        if not self.enabled:
            return
        n = self.total
        k = self.done
        width = 30
        bar = "#" * (width * k // n if n else width) + "." * (width - (width * k // n if n else width))
        msg = (
            f"\rbayesdid: variants [{bar}] {k}/{n} run, {self.failed} failed, {self.skipped} already done, "
            f"{time.perf_counter() - self.t0:.0f}s"
        )
        self.stream.write(msg + ("\n" if k == n else ""))
        self.stream.flush()


def run_sweep(
    plan: SweepPlan | str | Path,
    out: str | Path,
    *,
    executor: str = "pool",
    workers: int = 2,
    cluster: str | None = None,
    progress: bool = False,
    log=None,
) -> dict:
    """Run every variant that is not already complete in ``out``; write the tables; return a report.

    Parameters
    ----------
    plan : SweepPlan or path of a sweep file
    out : folder of the sweep's results (created; reused on a rerun)
    executor : 'serial' (in this process), 'pool' (local process pool, the default) or 'dask'
    workers : processes of the pool or of a local Dask cluster
    cluster : for 'dask', a scheduler address or 'local' (a LocalCluster on 127.0.0.1)

    Returns
    -------
    dict with ``ran``, ``skipped``, ``failed`` (id -> error), ``compiles`` (pid -> compiles),
    ``rows`` (summary.csv as dicts), ``verdict`` and ``seconds``.
    """
    say = log or (lambda m: None)
    if not isinstance(plan, SweepPlan):
        plan = load_sweep(plan)
    if executor not in EXECUTORS:
        raise SweepError(f"unknown executor '{executor}'; choose one of {sorted(EXECUTORS)}.")
    if executor == "dask" and not cluster:
        raise SweepError("the Dask executor needs --cluster: a scheduler address (tcp://host:8786) or 'local'.")
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise SweepError(f"--workers: expected a whole number of at least 1, found {workers!r}.")
    out = check_sweep_folder(out)
    t0 = time.perf_counter()
    (out / "variants").mkdir(parents=True, exist_ok=True)
    with _Lock(out):
        staging = out / ".staging"
        shutil.rmtree(staging, ignore_errors=True)  # leftovers of a killed run
        for p in (out / "variants").glob(".*"):
            shutil.rmtree(p, ignore_errors=True)
        for p in out.glob(".*.tmp-*"):  # half-written tables (_atomic_write); only the lock's owner writes them
            p.unlink(missing_ok=True)
        staging.mkdir()
        todo, skipped = [], []
        for v in plan.variants:
            folder = out / "variants" / v.id
            if variant_is_complete(folder, v.id):
                skipped.append(v.id)
                continue
            todo.append(
                {
                    "id": v.id,
                    "label": v.label,
                    "raw": v.raw,
                    "base_dir": str(plan.base.table.parent),
                    "drop": v.overrides.get("drop", []),
                    "overrides": v.overrides,
                    "seed": v.seed,
                    "folder": str(folder.resolve()),
                    "staging": str((staging / v.id).resolve()),
                    "data_sha256": plan.data_sha256[str(Path(v.raw["data"]["table"]))],
                }
            )
        say(
            f"{len(plan.variants)} variant(s): {len(skipped)} already done, {len(todo)} to run "
            f"({executor}{'' if executor == 'serial' else f', {workers} worker(s)'})"
        )
        meta = {
            "executor": executor,
            "workers": workers if executor != "serial" else 1,
            "cluster": cluster,
            "compiles_per_worker": {},
            "cache_loads_per_worker": {},
            "last_run": {"ran": [], "skipped": skipped},
        }
        failed, compiles, loads = {}, {}, {}
        bar = _Progress(len(todo), len(skipped), progress)
        rows = read_results(out, plan)
        if todo:
            for rec in EXECUTORS[executor](todo, workers, cluster):
                compiles[str(rec["pid"])] = compiles.get(str(rec["pid"]), 0) + rec["compiles"]
                loads[str(rec["pid"])] = loads.get(str(rec["pid"]), 0) + rec.get("loads", 0)
                meta["last_run"]["ran"].append(rec["id"])
                if rec["status"] == "failed":
                    failed[rec["id"]] = rec["error"]
                    say(f"variant {rec['id']} ({rec['label']}) failed: {rec['error']}")
                meta["compiles_per_worker"] = compiles
                meta["cache_loads_per_worker"] = loads
                rows = _rows_now(out, plan, failed)
                _write_tables(out, plan, rows, meta)
                bar.step(rec)
        rows = _rows_now(out, plan, failed)
        meta["seconds"] = time.perf_counter() - t0
        ver = _write_tables(out, plan, rows, meta)
        shutil.rmtree(staging, ignore_errors=True)
    return {
        "ran": meta["last_run"]["ran"],
        "skipped": skipped,
        "failed": failed,
        "compiles": compiles,
        "loads": loads,
        "rows": rows,
        "verdict": ver,
        "seconds": meta["seconds"],
        "out": str(out),
    }


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


# ---- verdict -----------------------------------------------------------------------------------
def _side(lo: float, hi: float) -> str:
    return "below zero" if hi < 0 else ("above zero" if lo > 0 else "spans zero")


def verdict(rows: Iterable[Mapping], *, base_id: str | None = None) -> dict:
    """Does the answer hold across variants? A small table for the report (DIR/verdict.json).

    Checks, each against the base variant (the first row unless ``base_id``):

    * sign: the sign of the posterior median of the effect (P(effect < 0) > 0.5 reads negative);
    * interval: the side of zero of the 90% equal-tailed interval (below, above, or spans zero);
    * decision: P(effect beyond the decision threshold) on the same side of 0.5 as in the base
      (not applicable without a threshold).

    ``moves_most`` names the variant whose effect mean is furthest from the base, in units of the
    base posterior sd, ``|mean_v - mean_base| / sd_base``; ``moves_probability_most`` the one whose
    P(beyond threshold) moves most. Failed or missing variants are counted, never judged.

    Returns
    -------
    dict: ``base``, ``judged``, ``not_judged``, ``checks`` (list of {check, base, holds, held_by,
    of, breaks: [ids]}), ``holds`` (all applicable checks hold), ``moves_most``,
    ``moves_probability_most``, ``rows`` (per variant: id, label, sign, interval, prob_beyond,
    shift_sd).
    """
    rows = [dict(r) for r in rows]
    done = [r for r in rows if r.get("status") == "done"]
    out: dict = {"judged": len(done), "not_judged": [r["id"] for r in rows if r.get("status") != "done"]}
    if not done:
        out.update(status="not applicable", reason="no finished variant to judge", checks=[], holds=None)
        return out
    want = base_id if base_id is not None else rows[0]["id"]
    base = next((r for r in done if r["id"] == want), None)
    if base is None:
        out.update(status="not applicable", reason="the base variant did not finish", checks=[], holds=None)
        return out
    f = float

    def sign(r):
        return "negative" if f(r["prob_lt_0"]) > 0.5 else "positive"

    def side(r):
        return _side(f(r["eti90_low"]), f(r["eti90_high"]))

    has_thr = base.get("prob_beyond_threshold") not in ("", None)

    def decide(r):
        return None if r.get("prob_beyond_threshold") in ("", None) else f(r["prob_beyond_threshold"]) > 0.5

    checks = []
    for name, fn, desc in (
        ("sign", sign, "sign of the effect (posterior median)"),
        ("interval", side, "90% interval's side of zero"),
        ("decision", decide, "P(beyond threshold) on the same side of 0.5"),
    ):
        if name == "decision" and not has_thr:
            checks.append(
                {
                    "check": name,
                    "what": desc,
                    "status": "not applicable",
                    "reason": "the study sets no decision threshold",
                    "holds": None,
                }
            )
            continue
        b = fn(base)
        breaks = [r["id"] for r in done if fn(r) != b]
        checks.append(
            {
                "check": name,
                "what": desc,
                "base": b,
                "holds": not breaks,
                "held_by": len(done) - len(breaks),
                "of": len(done),
                "breaks": breaks,
            }
        )
    sd = f(base["effect_sd"]) or 1.0
    table = []
    for r in done:
        table.append(
            {
                "id": r["id"],
                "label": r["label"],
                "effect_mean": f(r["effect_mean"]),
                "sign": sign(r),
                "interval": side(r),
                "eti_90": [f(r["eti90_low"]), f(r["eti90_high"])],
                "prob_beyond_threshold": f(r["prob_beyond_threshold"]) if has_thr and decide(r) is not None else None,
                "shift_sd": abs(f(r["effect_mean"]) - f(base["effect_mean"])) / sd,
            }
        )
    others = [t for t in table if t["id"] != base["id"]]
    mm = max(others, key=lambda t: t["shift_sd"]) if others else None
    out.update(
        base=base["id"],
        checks=checks,
        holds=all(c["holds"] for c in checks if c["holds"] is not None),
        moves_most=mm
        and {"id": mm["id"], "label": mm["label"], "effect_mean": mm["effect_mean"], "shift_sd": mm["shift_sd"]},
        rows=table,
        status="ok",
    )
    if has_thr and others:
        bp = f(base["prob_beyond_threshold"])
        mp = max(others, key=lambda t: abs((t["prob_beyond_threshold"] or bp) - bp))
        out["moves_probability_most"] = {
            "id": mp["id"],
            "label": mp["label"],
            "prob_beyond_threshold": mp["prob_beyond_threshold"],
            "change": (mp["prob_beyond_threshold"] or bp) - bp,
        }
    return out
