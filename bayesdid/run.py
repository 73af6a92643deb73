"""The end-to-end path: study + table -> cells -> model -> posterior -> effects -> run folder.

A run folder holds ``posterior.nc`` (ArviZ DataTree: posterior, log_likelihood, log_prior, sample_stats,
observed_data, constant_data), ``summary.json`` and ``manifest.json``. It is written into a
temporary sibling folder and renamed into place at the end (:class:`bayesdid.outputs.atomic_folder`),
so a failure leaves nothing half-written, and an existing folder is never overwritten unless asked.
"""

from __future__ import annotations

import json
import platform
import sys
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import xarray as xr

from .cells import Cells, collapse
from .contracts import run_id
from .crosscheck import cross_check, cross_check_not_applicable
from .data import file_sha256, read_table
from .effects import Effects, compute_effects
from .errors import BayesDidError, PersistenceFallbackWarning
from .model.family import family_record
from .model.registry import model_priors
from .model.structure import RHO_PRIOR, gap_structure, residual_rule
from .model.terms import resolve_scales
from .outputs import atomic_folder
from .sample import Fit, fit_cells
from .study import Study, study_to_dict
from .version import __version__

if TYPE_CHECKING:
    from .sensitivity import PowerScaling

__all__ = ["Analysis", "prepare", "analyse", "write_run", "versions", "atomic_folder", "dump_json"]


def versions() -> dict:
    import arviz
    import nutpie
    import pandas
    import pymc
    import pytensor

    return {
        "python": platform.python_version(),
        "bayesdid": __version__,
        "pymc": pymc.__version__,
        "pytensor": pytensor.__version__,
        "nutpie": nutpie.__version__,
        "arviz": arviz.__version__,
        "numpy": np.__version__,
        "pandas": pandas.__version__,
        "xarray": xr.__version__,
    }


@dataclass
class Analysis:
    """Results of one fit, ready to be written or read by checks and the report."""

    study: Study
    cells: Cells
    fit: Fit
    effects: Effects
    least_squares: dict
    priors: dict
    timing: dict
    data_sha256: str | None = None
    notes: list = field(default_factory=list)
    sensitivity: PowerScaling | None = None
    trends: object = None  # bayesdid.trends.TrendBounds

    def summary(self) -> dict:
        e = self.effects.to_dict()
        out = {
            "title": self.study.title,
            "effect": e["effect"],
            "per_adopter": e["per_adopter"],
            "least_squares": self.least_squares,
            "diagnostics": {k: v for k, v in self.fit.diagnostics.items()},
            "data": self.cells.describe(),
            "priors": self.priors,
            "timing": self.timing,
            "model": {
                "family": self.study.model.family,
                "log_outcome": self.study.model.log_outcome,
                "design": self.cells.design,
                "likelihood": self.cells.extra.get(
                    "likelihood", "exact on cells (jurisdiction-period shock and gap noise integrated out)"
                ),
                "sampled_as": _sampled_as(self.fit.spec),
                "gap_noise": gap_structure(self.cells).to_dict(),
                **(
                    {"residual_sd": residual_rule(self.cells)} if family_record(self.fit.spec.family).cell_model else {}
                ),
                **(
                    {
                        "covariates": {
                            "formula": self.study.model.covariates,
                            "columns": list(self.cells.extra["covariates"]["names"]),
                            "centred_at": [float(v) for v in self.cells.extra["covariates"]["means"]],
                        }
                    }
                    if "covariates" in self.cells.extra
                    else {}
                ),
            },
            "notes": self.notes,
        }
        if self.sensitivity is not None:
            out["sensitivity"] = self.sensitivity.to_dict()
        if self.trends is not None:
            out["parallel_trends"] = self.trends.to_dict()
        pers = persistence_summary(self.fit)
        if pers is not None:
            out["persistence"] = pers
        gsc = gap_scale_summary(self.fit)
        if gsc is not None:
            out["gap_scales"] = gsc
        for k in ("effect_percent", "effect_natural"):  # after the rest, as summary.json has always had them
            if k in e:
                out[k] = e[k]
        return out


def persistence_summary(fit) -> dict | None:
    """rho's posterior and one plain sentence on what it means for the answer (None if not fitted)."""
    if getattr(fit.spec, "gap", "independent") != "persistent":
        return None
    rho = fit.draws("rho")
    lo, hi = (float(v) for v in np.quantile(rho, [0.025, 0.975]))
    mean = float(rho.mean())
    if lo > 0.3:
        what = (
            "the gap noise is clearly persistent: a jurisdiction whose gap is above its usual level in one "
            "period tends to stay above it in the next, so a run of post-policy periods carries less "
            "independent evidence than its length suggests, and the effect's interval is widened for it"
        )
    elif hi < 0.3:
        what = (
            "the gap noise shows little persistence over periods; the answer is close to what an "
            "independent-noise model gives"
        )
    else:
        what = (
            "the data leave the persistence of the gap noise uncertain; the effect's interval allows for "
            "both weak and strong persistence"
        )
    return {
        "rho": {"mean": mean, "sd": float(rho.std()), "eti95": [lo, hi]},
        "prior": f"(rho + 1)/2 ~ Beta({RHO_PRIOR['a']:g}, {RHO_PRIOR['b']:g})",
        "sentence": f"Correlation of the gap noise from one period to the next: {mean:.2f} "
        f"(95% interval {lo:.2f} to {hi:.2f}); {what}.",
    }


#: a jurisdiction is named among the noisiest only when its median scale is at least this many times the
#: typical one (a 10% difference; below it the names would be noise of the ordering)
STANDOUT_SCALE = 1.1


def gap_scale_summary(fit, noisiest: int = 3) -> dict | None:
    """omega's posterior, each jurisdiction's gap-noise scale relative to the typical one, the noisiest
    jurisdictions and one plain sentence (None when one scale is shared)."""
    if getattr(fit.spec, "gap_scale", "shared") != "per_jurisdiction":
        return None
    from .model.structure import OMEGA_SCALE

    omega = fit.draws("omega")
    sg = fit.draws("sigma_gap")
    sj = fit.draws("sigma_gap_j")  # (S, J)
    rel = sj / sg[:, None]  # each jurisdiction's scale over the typical (median) one
    lo, hi = (float(v) for v in np.quantile(omega, [0.025, 0.975]))
    # typical factor between two jurisdictions' scales: exp(omega * median |z_1 - z_2|), median |N(0, 2)|
    pair = 0.6744897501960817 * np.sqrt(2.0)
    factor = float(np.median(np.exp(omega * pair)))
    f_lo, f_hi = (float(np.exp(v * pair)) for v in (lo, hi))
    names = list(fit.cells.jurisdictions)
    med_rel = np.median(rel, axis=0)
    order = np.argsort(-med_rel, kind="stable")
    top = [
        {
            "jurisdiction": str(names[i]),
            "relative_scale": float(med_rel[i]),
            "adopter": bool(i in set(fit.cells.adopters)),
        }
        for i in order[:noisiest]
    ]
    adopters = [
        {
            "jurisdiction": str(names[i]),
            "relative_scale": float(med_rel[i]),
            "eti95": [float(v) for v in np.quantile(rel[:, i], [0.025, 0.975])],
        }
        for i in fit.cells.adopters
    ]
    if f_hi < 1.25:
        what = "the jurisdictions' gap noise is about equally large; the answer is close to the shared-scale model's"
    elif f_lo > 1.25:
        what = (
            "the jurisdictions' gap noise clearly differs in size, and each adopter's effect is judged "
            "against its own noise"
        )
    else:
        what = (
            "the data leave open how much the jurisdictions' gap noise differs; the effect's interval allows for both"
        )
    standout = [t for t in top if t["relative_scale"] >= STANDOUT_SCALE]
    if standout:
        noisy = ", ".join(f"{t['jurisdiction']} ({t['relative_scale']:.2f} times)" for t in standout)
        noisy = f"Noisiest: {noisy}, relative to the typical jurisdiction."
    else:  # listing names at 1.01 times the typical scale would suggest a difference the fit does not show
        noisy = (
            f"No jurisdiction stands out: each one's scale is within {STANDOUT_SCALE - 1:.0%} of the typical "
            "one's (posterior medians)."
        )
    return {
        "omega": {"mean": float(omega.mean()), "sd": float(omega.std()), "eti95": [lo, hi]},
        "prior": f"omega ~ HalfNormal({OMEGA_SCALE:g}); log sigma_gap_j = log sigma_gap + omega z_j, z zero-sum "
        "standard normal over jurisdictions",
        "typical_factor": {"median": factor, "eti95": [f_lo, f_hi]},
        "noisiest": top,
        "adopters": adopters,
        "relative_scale": {str(names[i]): float(med_rel[i]) for i in range(len(names))},
        "sentence": f"Jurisdictions' gap noise differs by a typical factor of {factor:.2f} between two of them "
        f"(95% interval {f_lo:.2f} to {f_hi:.2f}); {what}. {noisy}",
    }


def _sampled_as(spec) -> dict:
    """The parameterisation choices of the compiled structure (they change the sampler's path only)."""
    base = "centred" if spec.centred else "non-centred"
    if not family_record(spec.family).cell_model:
        base += ", as levels with each latent field's mean over periods folded in"
    elif spec.G == 2:
        base += ", as level and gap per jurisdiction"
    if spec.effects == "event_time":
        eff = "one effect per event time"
    elif spec.A > 1:
        eff = "their mean (centred) plus zero-sum contrasts (non-centred); tau from its exact conditional"
    else:
        eff = "one adopter: tau itself"
    out = {"baselines": base, "adopter_effects": eff}
    if spec.fields:
        gap, shock = spec.fields
        out["gap_noise_deviations"] = "centred" if gap else "non-centred"
        if spec.gap == "persistent":
            out["gap_noise_deviations"] = (
                "AR(1) paths as parameters (centred)" if gap else "AR(1) paths from non-centred innovations"
            ) + "; each path's mean given its deviations folded into the target level"
        if spec.design == "DDD":
            out["shock_deviations"] = "centred" if shock else "non-centred"
    return out


def prepare(study: Study, *, stream: bool = False, cluster: str | None = None) -> tuple[Cells, str, float]:
    """Read the table and collapse it; returns (cells, data SHA-256, collapse seconds).

    ``stream`` (or a folder or glob in ``data.table``) collapses without reading the table into memory,
    ``cluster`` does so on Dask (see :mod:`bayesdid.stream`); the digest is then of the file listing.
    """
    from .stream import collapse_stream, should_stream

    if stream or cluster or should_stream(study):
        t0 = time.perf_counter()
        cells, digest = collapse_stream(study, cluster=cluster)
        return cells, digest, time.perf_counter() - t0
    frame = read_table(study.table)
    digest = file_sha256(study.table)
    t0 = time.perf_counter()
    cells = collapse(study, frame)
    return cells, digest, time.perf_counter() - t0


def analyse(
    study: Study,
    *,
    cells: Cells | None = None,
    progress: bool = False,
    log=None,
    full_cross_check: bool = True,
    least_squares: dict | None = None,
    prepared: tuple | None = None,
) -> Analysis:
    """Fit the study and compute its effects and the least-squares cross-check.

    ``full_cross_check=False`` (``bayesdid fit --no-cross-check``) keeps the least-squares estimate
    and its classical, HC1 and CR1 errors but skips the wild bootstrap and the permutation.
    ``least_squares`` may pass a cross-check already computed on the same cells (a sweep over
    priors reuses one); by default it is computed here. ``prepared`` passes what :func:`prepare`
    returned, for callers that check the table before any work (the command line).
    """
    say = log or (lambda msg: None)
    digest, collapse_s = None, 0.0
    if prepared is not None:  # (cells, data SHA-256, collapse seconds) from :func:`prepare`
        cells, digest, collapse_s = prepared
    elif cells is None:
        say(f"reading {study.table.name} and collapsing to cells")
        cells, digest, collapse_s = prepare(study)
    d = cells.describe()
    say(
        f"{d['rows']:,} rows -> {d['cells']:,} cells ({d['jurisdictions']} jurisdictions, "
        f"{d['periods']} periods, {len(d['adopters'])} adopter(s), {d['design']})"
    )
    priors = resolve_scales(cells, study.priors)
    scales = {k: v["scale"] for k, v in priors.items()}
    say("compiling the model (once per model shape) and sampling")
    fit = fit_cells(cells, scales, study.sampler, family=study.model.family, progress=progress)
    effects = compute_effects(fit, study.decision.threshold)
    if least_squares is None:
        say("least-squares cross-check" + ("" if full_cross_check else " (estimate and standard errors only)"))
    t0 = time.perf_counter()
    x = study.crosscheck
    ls_cells, ls_note = cells, None
    rec = family_record(study.model.family)
    if not rec.cell_model and "covariates" in cells.extra:
        # Least squares on cells regresses the cells' proportions or rates; the model's covariates act
        # on the link scale, which a linear regression on cell means cannot reproduce. The cross-check
        # is then the unadjusted one, and says so.
        import dataclasses

        ls_cells = dataclasses.replace(cells, extra={k: v for k, v in cells.extra.items() if k != "covariates"})
        ls_note = (
            f"computed without the covariates ({study.model.covariates}): the model adjusts for them on the "
            f"{rec.link_label.replace(' ', '-')} scale, which a linear regression on the cells' "
            f"{rec.cell_quantity} cannot reproduce; read it as the unadjusted difference"
        )
    try:
        ls = (
            least_squares
            if least_squares is not None
            else cross_check(
                ls_cells, seed=x.seed, draws=x.draws, weights=x.weights, placebos=x.placebos, full=full_cross_check
            )
        )
        if ls_note and least_squares is None:
            ls["covariates_note"] = ls_note
    except BayesDidError as exc:  # the posterior stands; the cross-check says why it cannot run
        ls = cross_check_not_applicable(str(exc))
    crosscheck_s = time.perf_counter() - t0
    notes = []
    if len(cells.adopters) <= 2:
        notes.append(
            f"{len(cells.adopters)} adopting jurisdiction(s): cluster-robust least-squares errors are "
            "unreliable with so few treated clusters (Conley and Taber 2011; MacKinnon and Webb 2017)."
        )
    for msg in cells.extra.get("warnings", []):
        notes.append(msg)
    gs = gap_structure(cells)
    for why in (gs.fallback, gs.scale_fallback):
        if why:
            notes.append(why)
            say("WARNING: " + why)
            warnings.warn(why, PersistenceFallbackWarning, stacklevel=2)
    if family_record(fit.spec.family).cell_model and not fit.spec.residual:
        notes.append("No separate residual sd: " + residual_rule(cells)["reason"])
    if cells.extra.get("fallback"):
        notes.append(cells.extra["fallback"])
        say("WARNING: " + cells.extra["fallback"])
    if cells.extra.get("dropped_rows"):
        dr = cells.extra["dropped_rows"]
        notes.append(
            f"{dr['count']} row(s) dropped for a missing covariate value (model.missing = 'drop'); "
            f"missing by column: {dr['by_column']}."
        )
        say(notes[-1])
    from .sensitivity import power_scaling

    t0 = time.perf_counter()
    sens = power_scaling(fit)
    timing = {
        "collapse_s": collapse_s,
        **fit.timing,
        "crosscheck_s": crosscheck_s,
        "sensitivity_s": time.perf_counter() - t0,
    }
    from .trends import model_threshold, trend_bounds

    t0 = time.perf_counter()
    tb = trend_bounds(
        fit, multiples=study.trends.multiples, threshold=model_threshold(study, cells), level=study.decision.level
    )
    timing["trends_s"] = time.perf_counter() - t0
    has = model_priors(
        study.model.family,
        cells.design,
        len(cells.adopters),
        "covariates" in cells.extra,
        drift=bool(getattr(fit.spec, "drift", False)),
        residual=bool(getattr(fit.spec, "residual", True)),
    )
    priors = {k: v for k, v in priors.items() if k in has}  # only the priors the fitted model has
    return Analysis(
        study=study,
        cells=cells,
        fit=fit,
        effects=effects,
        least_squares=ls,
        priors=priors,
        timing=timing,
        data_sha256=digest,
        notes=notes,
        sensitivity=sens,
        trends=tb,
    )


def _tree_for_file(an: Analysis) -> xr.DataTree:
    """posterior + log_likelihood + sample_stats + observed/constant data, with the data's labels."""
    from .effects import att_draws
    from .model.registry import pointwise_loglik
    from .sensitivity import log_prior_dataset

    fit = an.fit
    cells = an.cells
    post = fit.posterior.copy()
    post["att"] = att_draws(post["tau_adopter"], cells)
    post["att"].attrs = {"meaning": "ATT = sum_j w_j tau_adopter[j], w_j = share of treated target-group rows"}
    coords = {
        "jurisdiction": list(cells.jurisdictions),
        "group": list(cells.groups),
        "period": [str(p) for p in cells.periods],
    }
    ll = pointwise_loglik(fit)
    C, D = post.sizes["chain"], post.sizes["draw"]
    ll_da = xr.DataArray(
        ll.reshape(C, D, *ll.shape[1:]),
        dims=("chain", "draw", "jurisdiction", "period"),
        coords={
            "chain": post["chain"],
            "draw": post["draw"],
            "jurisdiction": coords["jurisdiction"],
            "period": coords["period"],
        },
    )
    mean = cells.mean
    observed = xr.Dataset({"cell_mean": (("jurisdiction", "group", "period"), mean)}, coords=coords)
    const = xr.Dataset(
        {
            "n": (("jurisdiction", "group", "period"), cells.n),
            "sum_y": (("jurisdiction", "group", "period"), cells.sum_y),
            "sum_y2": (("jurisdiction", "group", "period"), cells.sum_y2),
            "treated": (("jurisdiction", "group", "period"), cells.treated.astype(np.int8)),
            "start_index": (("jurisdiction",), cells.start),
        },
        coords=coords,
    )
    stats = fit.tree["sample_stats"].to_dataset()
    keep = [v for v in stats.data_vars if stats[v].dtype != object]
    groups = {
        "posterior": post,
        "log_likelihood": xr.Dataset({"cells": ll_da}),
        "log_prior": log_prior_dataset(fit),
        "sample_stats": stats[keep],
        "observed_data": observed,
        "constant_data": const,
    }
    for ds in groups.values():
        ds.attrs = {k: (json.dumps(v) if not isinstance(v, (str, int, float)) else v) for k, v in ds.attrs.items()}
    return xr.DataTree.from_dict(groups)


def dump_json(obj, path: Path) -> None:
    path.write_text(json_text(obj), encoding="utf-8")


def json_text(obj) -> str:
    """The JSON text bayesdid writes (indented; numpy numbers and arrays, paths as plain values)."""

    def default(o):
        if isinstance(o, (np.integer,)):
            return int(o)
        if isinstance(o, (np.floating,)):
            return float(o)
        if isinstance(o, np.ndarray):
            return o.tolist()
        if isinstance(o, Path):
            return str(o)
        return str(o)

    return json.dumps(obj, indent=2, default=default, allow_nan=True) + "\n"


def write_run(an: Analysis, out: str | Path, *, replace: bool = False, argv=None) -> Path:
    """Write posterior.nc, summary.json and manifest.json into ``out`` atomically."""
    with atomic_folder(out, replace=replace) as tmp:
        t0 = time.perf_counter()
        tree = _tree_for_file(an)
        tree.to_netcdf(tmp / "posterior.nc", engine="h5netcdf")
        summary = an.summary()
        summary["timing"]["write_s"] = time.perf_counter() - t0
        rid = run_id(an.data_sha256, study_to_dict(an.study))
        summary["identity"] = {"data_sha256": an.data_sha256, "run_id": rid}
        dump_json(summary, tmp / "summary.json")
        files = ["posterior.nc", "summary.json", "manifest.json"]
        if an.trends is not None and an.trends.rows:
            from .trends import write_trends

            files.append(write_trends(an.trends, tmp).name)
        manifest = {
            "bayesdid": __version__,
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "versions": versions(),
            "seed": an.study.sampler.seed,
            "sampler": {
                "name": "nutpie (NUTS)",
                "chains": an.study.sampler.chains,
                "draws": an.study.sampler.draws,
                "tune": an.study.sampler.tune,
            },
            "data_sha256": an.data_sha256,
            "run_id": rid,
            "table": str(an.study.table),
            "study": study_to_dict(an.study),
            "command": list(argv) if argv is not None else sys.argv,
            "files": files,
        }
        dump_json(manifest, tmp / "manifest.json")
    return Path(out)
