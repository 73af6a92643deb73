"""`bayesdid bench collapse`: the same DDD model on rows versus on exactly collapsed cells.

The row model is the DESIGN.md model written the direct way: every row is Normal(eta + s[j,t] +
e[j,t] * 1[target], sigma[g]) with the jurisdiction-period shock s and the gap noise e as latent
non-centred fields; e has the structure the cell model fits (AR(1) over periods by default, each
jurisdiction's own pooled scale by default, :mod:`bayesdid.model.structure`). The cell model is bayesdid's: the same likelihood on per-cell sufficient
statistics with s and e integrated out exactly. Both have the same posterior for tau; the
benchmark measures bulk ESS of the ATT per second of sampling, with the same sampler settings,
and how the cell model's sampling time and the collapse scale with the number of rows.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np

from ..cells import collapse_frame
from ..data import check_roles
from ..effects import att_weights
from ..model.families import PT, ar1_factor
from ..model.structure import RHO_PRIOR, gap_scale_terms, gap_structure
from ..model.terms import coords_of, hierarchical_mean, resolve_scales
from ..sample import compile_exact, fit_cells
from ..simulate import Scenario, simulate
from ..study import SamplerSettings, make_study

__all__ = ["bench_collapse"]


def _study_cells(rows: int, seed: int):
    J, T = 40, 12
    sc = Scenario(
        jurisdictions=J,
        periods=T,
        groups=2,
        starts={0: 6, 1: 8},
        tau=-0.15,
        rows_per_cell=rows / (J * 2 * T),
        gap_sd=0.05,
    )
    frame, truth = simulate(sc, seed)
    study = make_study(
        table="bench.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
    )
    checked = check_roles(study, frame)
    t0 = time.perf_counter()
    cells = collapse_frame(study, checked)
    return study, frame, cells, time.perf_counter() - t0


def _row_model(cells, frame, scales):
    import pymc as pm

    J, G, T = cells.shape
    jidx = {k: i for i, k in enumerate(cells.jurisdictions)}
    gidx = {k: i for i, k in enumerate(cells.groups)}
    j = frame["region"].map(jidx).to_numpy()
    g = frame["group"].map(gidx).to_numpy()
    t = frame["period"].to_numpy() - 1
    y = frame["y"].to_numpy()
    with pm.Model(coords=coords_of(cells)) as model:
        m, S = hierarchical_mean(cells, scales)
        sigma = pm.HalfNormal("sigma", S["residual"], dims=("group",))
        gs = gap_structure(cells)
        _, sg_j = gap_scale_terms(S, gs.scale, J)
        sigma_gap = sg_j[:, None] if gs.scale == "per_jurisdiction" else sg_j
        sigma_shock = pm.HalfNormal("sigma_shock", S["shock_spread"])
        ia = S["is_adopter"][:, None]
        shock_sd = ia * S["period"] + (1.0 - ia) * sigma_shock
        z_s = pm.Normal("z_shock", 0.0, 1.0, dims=("jurisdiction", "period"))
        z_e = pm.Normal("z_gap", 0.0, 1.0, dims=("jurisdiction", "period"))
        s = shock_sd * z_s
        if gs.over_time == "persistent":  # as the families' non-centred AR(1) paths: e = sigma_gap L(rho) z
            u = pm.Beta("rho_unit", RHO_PRIOR["a"], RHO_PRIOR["b"])
            rho = pm.Deterministic("rho", 2.0 * u - 1.0)
            e = sigma_gap * (z_e[:, None, :] * ar1_factor(rho, T, PT)[None, :, :]).sum(axis=-1)
        else:
            e = sigma_gap * z_e
        eta = m[j, g, t] + s[j, t] + e[j, t] * (g == cells.target)
        pm.Normal("y", eta, sigma[g], observed=y)
    return model


def _ess_att(tree, cells):
    import arviz as az
    import xarray as xr

    tau_a = tree["posterior"]["tau_adopter"]
    w = xr.DataArray(att_weights(cells), dims=("adopter",), coords={"adopter": tau_a["adopter"]})
    att = (tau_a * w).sum("adopter")
    ds = xr.Dataset({"att": att})
    return float(az.ess(ds, method="bulk")["att"]), float(att.mean()), float(att.std())


def bench_collapse(*, quick: bool = False, seed: int = 7, large: bool = False, rows: int | None = None) -> dict:
    """The row-versus-cell model comparison; with ``large``, the streaming collapse of a big Parquet data set
    (:func:`bench_collapse_large`)."""
    if large:
        return bench_collapse_large(rows=rows or 200_000_000, quick=quick)
    import nutpie

    small, large = (5_000, 200_000) if quick else (50_000, 5_000_000)
    settings = SamplerSettings(chains=2, draws=300 if quick else 1000, tune=300 if quick else 1000, seed=seed)
    study, frame, cells, collapse_small = _study_cells(small, seed)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}

    # cells
    fit = fit_cells(cells, scales, settings)
    ess_c, mean_c, sd_c = _ess_att(fit.tree, cells)
    t_cells_small = fit.timing["sample_s"]

    # rows (same hierarchical terms, latent shock and gap fields)
    model = _row_model(cells, frame, scales)
    t0 = time.perf_counter()
    compiled = compile_exact(model)  # compiled as the cell model is
    compile_rows = time.perf_counter() - t0
    t0 = time.perf_counter()
    tree = nutpie.sample(
        compiled,
        draws=settings.draws,
        tune=settings.tune,
        chains=settings.chains,
        seed=settings.seed,
        progress_bar=False,
        save_warmup=False,
        target_accept=0.9,
    )
    t_rows = time.perf_counter() - t0
    ess_r, mean_r, sd_r = _ess_att(tree, cells)

    # scaling of the cell model with rows
    _, big_frame, big_cells, collapse_large = _study_cells(large, seed)
    del big_frame
    fit_big = fit_cells(big_cells, scales, settings)
    t_cells_large = fit_big.timing["sample_s"]

    mcse = np.sqrt(sd_c**2 / max(ess_c, 1) + sd_r**2 / max(ess_r, 1))
    return {
        "benchmark": "collapse",
        "rows_small": int(cells.rows),
        "rows_large": int(big_cells.rows),
        "cells": int(cells.n_cells),
        "draws": settings.draws,
        "tune": settings.tune,
        "chains": settings.chains,
        "ess_per_s_cells": ess_c / t_cells_small,
        "ess_per_s_rows": ess_r / t_rows,
        "ess_per_s_ratio_cells_over_rows": (ess_c / t_cells_small) / (ess_r / t_rows),
        "target_ess_ratio": 30.0,
        "att_mean_cells": mean_c,
        "att_mean_rows": mean_r,
        "att_mean_diff_in_mcse": abs(mean_c - mean_r) / mcse,
        "sample_s_cells_small": t_cells_small,
        "sample_s_rows_small": t_rows,
        "compile_s_rows": compile_rows,
        "sample_time_ratio_large_over_small": t_cells_large / t_cells_small,
        "target_time_ratio": 1.5,
        "collapse_s_large": collapse_large,
        "target_collapse_s": 5.0,
    }


# ---- large-table mode (bayesdid bench collapse --large) ---------------------------------------------
LARGE_TARGETS = {"seconds": 90.0, "peak_gb": 3.0}


def write_parquet_parts(
    folder, rows: int, *, parts: int = 20, seed: int = 7, jurisdictions: int = 40, periods: int = 12
) -> dict:
    """Write ``rows`` invented DDD rows as ``parts`` Parquet files (text columns dictionary-encoded)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ..simulate import region_names

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    names = pa.array(region_names(jurisdictions))
    groups = pa.array(["reference", "target"])
    rng = np.random.default_rng(seed)
    base = rng.normal(10.0, 1.0, size=(jurisdictions, 2, periods))
    per = -(-rows // parts)
    written = 0
    for i in range(parts):
        k = min(per, rows - written)
        if k <= 0:
            break
        j = rng.integers(0, jurisdictions, size=k, dtype=np.int32)
        g = rng.integers(0, 2, size=k, dtype=np.int32)
        t = rng.integers(0, periods, size=k, dtype=np.int32)
        y = base[j, g, t] + rng.standard_normal(k)
        table = pa.table(
            {
                "region": pa.DictionaryArray.from_arrays(pa.array(j), names),
                "group": pa.DictionaryArray.from_arrays(pa.array(g), groups),
                "period": pa.array(t + 1, type=pa.int16()),
                "y": pa.array(y),
            }
        )
        pq.write_table(table, folder / f"part-{i:03d}.parquet", row_group_size=1 << 20)
        written += k
        del j, g, t, y, table
    return {"rows": written, "parts": parts, "adopters": {region_names(jurisdictions)[0]: 7}}


def bench_collapse_large(
    *, rows: int = 200_000_000, quick: bool = False, folder: str | None = None, keep: bool = False
) -> dict:
    """Write a Parquet data set in parts, then stream-collapse it in a fresh process (time and peak
    memory by ``resource.getrusage``), and again on a Dask LocalCluster (2 workers): its cells must
    equal the local ones bit for bit."""
    import json
    import shutil
    import subprocess
    import sys
    import tempfile

    rows = 2_000_000 if quick else rows
    root = Path(folder) if folder else Path(tempfile.mkdtemp(prefix="bayesdid-large-"))
    data = root / "parts"
    t0 = time.perf_counter()
    meta = write_parquet_parts(data, rows, parts=max(2, min(40, rows // 5_000_000)))
    write_s = time.perf_counter() - t0
    res = {}
    try:
        for kind, cluster in (("local", None), ("dask", "local")):
            out = root / f"{kind}.npz"
            subprocess.run(
                [
                    sys.executable,
                    "-m",
                    "bayesdid.bench.large_child",
                    str(data),
                    json.dumps(meta["adopters"]),
                    cluster or "",
                    str(out),
                ],
                check=True,
            )
            with np.load(out) as z:
                res[kind] = {k: z[k] for k in z.files}
    finally:
        if not keep:
            shutil.rmtree(root, ignore_errors=True)
    loc, dsk = res["local"], res["dask"]
    equal = all(np.array_equal(loc[k], dsk[k]) for k in ("n", "sum_y", "ss"))
    peak_gb = float(loc["peak_kb"]) / 1024**2
    seconds = float(loc["seconds"])
    return {
        "benchmark": "collapse-large",
        "rows": int(loc["rows"]),
        "parts": meta["parts"],
        "cores": os.cpu_count(),
        "write_s": round(write_s, 1),
        "collapse_s": round(seconds, 2),
        "peak_gb": round(peak_gb, 3),
        "rows_per_s": round(float(loc["rows"]) / seconds),
        "dask_collapse_s": round(float(dsk["seconds"]), 2),
        "dask_equals_local_bitwise": bool(equal),
        "target_s": LARGE_TARGETS["seconds"],
        "target_peak_gb": LARGE_TARGETS["peak_gb"],
        "seconds_over_target": round(seconds / LARGE_TARGETS["seconds"], 3),
        "peak_over_target": round(peak_gb / LARGE_TARGETS["peak_gb"], 3),
    }
