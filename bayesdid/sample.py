"""The only caller of the sampler: compile once per model structure, sample, diagnose.

Compiled models are cached per process by their :class:`~bayesdid.model.ModelSpec`; a new data set or
new prior scales of the same structure re-sample through ``compiled.with_data(...)`` without a
recompile. Across processes they are cached on disk (:mod:`bayesdid.modelcache`): a structure compiled
once, by any process, loads in about a second. :data:`COMPILES` counts real compiles and
:data:`LOADS` loads from disk (tests assert on both).
"""

from __future__ import annotations

import dataclasses
import threading
import time
import warnings
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from .cells import Cells
from .errors import DiagnosticsWarning
from .model.registry import build_model
from .model.registry import data_arrays as registry_data_arrays
from .model.terms import design_data, model_spec
from .modelcache import compile_cached
from .study import SamplerSettings

__all__ = [
    "Fit",
    "fit_cells",
    "diagnose",
    "COMPILES",
    "LOADS",
    "THRESHOLDS",
    "clear_cache",
    "compile_exact",
    "Stopped",
    "stop_when",
    "LeanDraws",
    "sample_draws",
    "sample_draws_many",
]

#: Vehtari et al. (2021), Bayesian Analysis 16(2): R-hat below 1.01, bulk and tail ESS of at least 400.
THRESHOLDS = {"rhat_max": 1.01, "ess_bulk_min": 400, "ess_tail_min": 400, "divergences": 0}

#: Real compiles in this process (a model loaded from the compile cache on disk is not one).
COMPILES = {"count": 0}
#: Compiled models loaded from the compile cache on disk (see :mod:`bayesdid.modelcache`).
LOADS = {"count": 0}
#: NUTS target acceptance rate; above nutpie's 0.8 default to keep divergences away from the
#: variance parameters of few-member hierarchies (a handful of adopters).
TARGET_ACCEPT = 0.9
_CACHE: dict[tuple, tuple] = {}


def clear_cache() -> None:
    _CACHE.clear()


class Stopped(RuntimeError):
    """Raised inside :func:`stop_when` once its check says the work is no longer wanted."""


_STOP = threading.local()
#: seconds between two looks at a :func:`stop_when` check while sampling
STOP_POLL = 0.1


@contextmanager
def stop_when(check):
    """In this thread, within the block: no compile starts and sampling is cancelled once ``check()`` is true.

    Both raise :class:`Stopped` (sampling within :data:`STOP_POLL` seconds; a compile already under way
    finishes first and stays cached). Sweeps on Dask use it to end a variant whose sweep was killed:
    the cluster's worker processes are not the sweep's to end, but its work on them is. Outside such
    a block sampling is the plain blocking call.
    """
    prev = getattr(_STOP, "check", None)
    _STOP.check = check
    try:
        yield
    finally:
        _STOP.check = prev


def _stop_if_asked() -> None:
    check = getattr(_STOP, "check", None)
    if check is not None and check():
        raise Stopped("stopped: the process that asked for this work is gone")


def _sample(compiled, **kw):
    """nutpie.sample, or, inside :func:`stop_when`, the same sampler run in the background and polled."""
    import nutpie

    check = getattr(_STOP, "check", None)
    if check is None:
        return nutpie.sample(compiled, **kw)
    sampler = nutpie.sample(compiled, blocking=False, **kw)
    try:
        while True:
            try:  # nutpie raises TimeoutError while the sampler still runs (is_finished may too)
                return sampler.wait(timeout=STOP_POLL)
            except TimeoutError:
                if check():
                    raise Stopped("stopped while sampling: the process that asked for this work is gone") from None
    except BaseException:
        sampler.cancel()
        raise


@dataclass
class Fit:
    """A posterior with what produced it."""

    cells: Cells
    tree: xr.DataTree
    spec: object
    scales: dict
    settings: SamplerSettings
    timing: dict = field(default_factory=dict)
    diagnostics: dict = field(default_factory=dict)

    @property
    def posterior(self) -> xr.Dataset:
        return self.tree["posterior"].to_dataset()

    def draws(self, name: str) -> np.ndarray:
        """Draws of a variable with chain and draw stacked first: shape (S, ...)."""
        da = self.posterior[name]
        return da.stack(sample=("chain", "draw")).transpose("sample", ...).to_numpy()


def _data_updates(cells: Cells, scales: dict, family: str, event_times: tuple = ()) -> dict:
    upd = {f"prior_{k}": np.asarray(float(v)) for k, v in scales.items()}
    upd["outcome_location"] = np.asarray(float(cells.outcome_mean))
    upd.update(design_data(cells, event_times))
    upd.update(registry_data_arrays(cells, family))
    return upd


def compile_exact(model):
    """``nutpie.compile_pymc_model`` with PyTensor's numba fast-math flags off.

    With fast-math (PyTensor's default) LLVM may reassociate and vectorise sums, and how it peels a
    loop depends on the memory alignment of the arrays, which differs between processes: the same
    seed then gives draws that differ in the last bits, and sampling can grow that into different
    draws. Sweeps and calibration run variants in worker processes and promise the same draws for
    the same seed as a serial run, so every model is compiled without it.
    """
    import nutpie
    import pytensor

    with pytensor.config.change_flags(numba__fastmath=False):
        return nutpie.compile_pymc_model(model)


#: One thread at a time builds or re-targets a compiled model (two threads asking for a structure not
#: yet compiled then compile it once).
_COMPILE_LOCK = threading.Lock()
_INIT_LOCK = threading.Lock()


def _pinned(compiled, model, values: dict):
    """``compiled`` whose initial-point function first sets the model's data containers to ``values``.

    nutpie's initial points come from PyMC's function, which reads the PyMC model's own data containers
    (HalfNormal priors start at their scale, group means at the outcome's location) when a chain
    starts, not when ``with_data`` is called. Fits sampled at the same time in threads
    (:func:`sample_draws_many`) share that model; pinned, each chain starts from its own fit's data.
    """
    base = compiled.initial_point_func

    def init(seed=None):
        with _INIT_LOCK:
            for k, v in values.items():
                model[k].set_value(v)
            return base(seed)

    return dataclasses.replace(compiled, initial_point_func=init)


def _compiled_for(cells: Cells, scales: dict, family: str, terms: dict | None = None):
    with _COMPILE_LOCK:
        return _compiled_for_locked(cells, scales, family, terms)


def _compiled_for_locked(cells: Cells, scales: dict, family: str, terms: dict | None = None):

    terms = terms or {}
    spec = model_spec(cells, family, **terms)
    key = spec.key()
    if key in _CACHE:
        compiled, names, model = _CACHE[key]
        upd = {k: v for k, v in _data_updates(cells, scales, family, spec.event_times).items() if k in names}
        # nutpie's with_data swaps the data of logp and of the draws; the initial-point function is
        # PyMC's and reads the model's own data containers (HalfNormal priors start at their scale,
        # the group means at the outcome's location). Set them too, so that a fit does not depend on
        # which variant happened to compile this structure in this process.
        values = {k: np.asarray(v, dtype=model[k].dtype) for k, v in upd.items()}
        for k, v in values.items():
            model[k].set_value(v)
        return _pinned(compiled.with_data(**upd), model, values), spec, 0.0
    _stop_if_asked()
    model, spec = build_model(cells, scales, family, **terms)
    t0 = time.perf_counter()
    compiled, how = compile_cached(model, compile_exact)
    dt = time.perf_counter() - t0
    if how == "compiled":
        COMPILES["count"] += 1
    else:
        LOADS["count"] += 1
    # The data containers the compiled functions read: a container the graph no longer uses (the
    # cell counts of a model without a residual sd, folded away as 0 * x) is not among them, and
    # nutpie's with_data refuses names it does not know.
    used = {var.name for var in compiled.shared_var_keys}
    names = set(model.named_vars) & used
    _CACHE[key] = (compiled, names, model)
    values = {k: np.array(model[k].get_value(), copy=True) for k in names}
    return _pinned(compiled, model, values), spec, dt


def fit_cells(
    cells: Cells,
    scales: dict,
    settings: SamplerSettings,
    *,
    family: str = "gaussian",
    progress: bool = False,
    effects: str = "att",
    event_times: tuple | None = None,
    event_pooled: bool = False,
) -> Fit:
    """Sample the posterior of the model of ``family`` on ``cells``.

    Parameters
    ----------
    cells : Cells
        The collapsed data.
    scales : dict
        Prior scale per name (see :data:`bayesdid.study.PRIOR_NAMES`).
    settings : SamplerSettings
        Chains, draws, tune and seed. The same seed gives the same draws.
    progress : bool
        Show nutpie's progress display.
    effects, event_times, event_pooled
        The treatment terms (see :func:`bayesdid.model.terms.hierarchical_mean`); the default is the
        per-adopter effect. ``effects="event_time"`` fits one effect per event time.
    """
    terms = {} if effects == "att" else {"effects": effects, "event_times": event_times, "event_pooled": event_pooled}
    compiled, spec, compile_s = _compiled_for(cells, scales, family, terms)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        tree = _sample(
            compiled,
            draws=settings.draws,
            tune=settings.tune,
            chains=settings.chains,
            cores=min(settings.chains, 2),
            seed=settings.seed,
            progress_bar=progress,
            save_warmup=False,
            target_accept=TARGET_ACCEPT,
        )
    sample_s = time.perf_counter() - t0
    tree = _relabel(tree, cells, spec)
    fit = Fit(
        cells=cells,
        tree=tree,
        spec=spec,
        scales=dict(scales),
        settings=settings,
        timing={"compile_s": compile_s, "sample_s": sample_s},
    )
    fit.diagnostics = diagnose(tree)
    return fit


@dataclass
class LeanDraws:
    """Raw draws of a few variables, for callers that fit many data sets (``bayesdid plan``).

    ``values[name]`` has shape (chains, draws, *shape); no ArviZ tree, no coordinates, no diagnostics
    beyond the count of divergent transitions (the caller judges what it needs).
    """

    values: dict
    spec: object
    divergences: int
    timing: dict = field(default_factory=dict)

    def draws(self, name: str) -> np.ndarray:
        """Draws of ``name`` with chain and draw stacked first: shape (S, ...), as :meth:`Fit.draws`."""
        v = self.values[name]
        return v.reshape((-1,) + v.shape[2:])


def sample_draws(
    cells: Cells,
    scales: dict,
    settings: SamplerSettings,
    var_names,
    *,
    family: str = "gaussian",
    cores: int = 1,
) -> LeanDraws:
    """Sample as :func:`fit_cells` (same compiled model, sampler settings and seed) and keep only ``var_names``.

    The lean path for many inner fits: nutpie's raw trace is read column by column, so there is no
    conversion to an ArviZ tree and no ESS/R-hat over every parameter (about 40% of a 2 x 300 draw
    fit of the demo model). ``cores`` threads sample the chains (1: the caller runs several fits in
    parallel processes). Honours :func:`stop_when` like every fit. Raises ``KeyError`` naming a
    variable the model does not have.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return _lean_sample(cells, scales, settings, var_names, family=family, cores=cores)


def _lean_sample(cells, scales, settings, var_names, *, family, cores) -> LeanDraws:
    # the body of sample_draws; warnings.catch_warnings is not thread-safe, so callers set the filter
    # once around all their fits (sample_draws_many)
    compiled, spec, compile_s = _compiled_for(cells, scales, family)
    t0 = time.perf_counter()
    raw = _sample(
        compiled,
        draws=settings.draws,
        tune=settings.tune,
        chains=settings.chains,
        cores=max(1, int(cores)),
        seed=settings.seed,
        progress_bar=False,
        save_warmup=False,
        target_accept=TARGET_ACCEPT,
        return_raw_trace=True,
    )
    sample_s = time.perf_counter() - t0
    draw_batches, stat_batches = raw.get_arrow_trace()
    names = list(var_names)
    chains: dict[str, list] = {k: [] for k in names}
    divergences = gradients = 0
    for draw, stat in zip(draw_batches, stat_batches, strict=True):
        gradients += int(_column(stat, "n_steps").sum())
        post = ~_column(stat, "tuning").astype(bool)
        if "diverging" in stat.column_names:
            divergences += int(_column(stat, "diverging").astype(bool)[post].sum())
        for k in names:
            if k not in draw.column_names:
                have = sorted(c for c in draw.column_names if not c.endswith("__"))
                raise KeyError(f"the model has no variable {k!r}; it has {have}")
            chains[k].append(_column(draw, k)[post])
    values = {k: np.stack(v) for k, v in chains.items()}
    # gradients: evaluations of the log density's gradient in all chains, tuning included (the work done)
    timing = {"compile_s": compile_s, "sample_s": sample_s, "gradients": gradients}
    return LeanDraws(values=values, spec=spec, divergences=divergences, timing=timing)


def sample_draws_many(jobs: list[dict], *, workers: int = 2, done=None) -> list[LeanDraws]:
    """:func:`sample_draws` for each job (a dict of its keyword arguments), ``workers`` fits at a time.

    The fits run in threads (nutpie samples outside the GIL): with ``cores=1`` per job (the default)
    two workers keep two cores busy without the idle tail of a fit whose chains end at different
    times. Each fit's draws depend only on its own data and seed (initial points are pinned, see
    :func:`_pinned`; the number of threads does not change the draws), so they equal those of the fits
    run one by one. Results come back in the order of ``jobs``; ``done(i)``, if given, is called in
    that order as each is ready. A :func:`stop_when` check of the calling thread applies to every fit.
    """
    check = getattr(_STOP, "check", None)

    def one(job):
        job = {"family": "gaussian", "cores": 1, **job}
        with stop_when(check) if check is not None else nullcontext():
            return _lean_sample(**job)

    out = []
    with warnings.catch_warnings(), ThreadPoolExecutor(max_workers=max(1, workers)) as pool:
        warnings.simplefilter("ignore", RuntimeWarning)
        for i, result in enumerate(pool.map(one, jobs)):
            out.append(result)
            if done is not None:
                done(i)
    return out


def _column(batch, name: str) -> np.ndarray:
    """One column of a nutpie arrow batch as an array of shape (rows, *shape), as nutpie reads it."""
    import pyarrow

    col = batch.column(name)
    meta = col.field.metadata or {}
    shape = meta.get(b"shape", b"")
    shape = tuple(int(x) for x in shape.decode().split(",")) if shape else ()
    arr = pyarrow.array(col)
    if hasattr(arr, "flatten"):
        arr = arr.flatten()
    return np.asarray(arr.to_numpy(zero_copy_only=False)).reshape((batch.num_rows,) + shape)


def _relabel(tree, cells: Cells, spec):
    """Give the draws this data set's labels.

    A compiled model reused through ``with_data`` keeps the coordinates of the data set it was first
    built on; the shapes are the same but the labels (jurisdictions, periods, adopters, covariates)
    may differ, so they are set again from ``cells``.
    """
    from .model.terms import coords_of

    coords = coords_of(cells, getattr(spec, "event_times", ()) or ())
    cov = cells.extra.get("covariates") if cells.extra else None
    if cov is not None:
        coords["covariate"] = list(cov["names"])
    for group in ("posterior", "sample_stats"):
        if group not in tree.children:
            continue
        ds = tree[group].to_dataset()
        upd = {k: v for k, v in coords.items() if k in ds.dims and ds.sizes[k] == len(v)}
        if upd:
            tree[group] = xr.DataTree(ds.assign_coords(upd))
    return tree


def diagnose(
    tree, *, rhat_max: float = THRESHOLDS["rhat_max"], ess_min: float = THRESHOLDS["ess_bulk_min"], var_names=None
) -> dict:
    """Convergence diagnostics over the sampled parameters, judged against Vehtari et al. (2021).

    Returns a dict with ``rhat_max``, ``ess_bulk_min``, ``ess_tail_min``, ``divergences``, ``ok``,
    the thresholds, the worst parameters and a plain ``advice`` when not ok.
    """
    import arviz as az

    post = tree["posterior"].to_dataset()
    names = var_names or list(post.data_vars)
    sub = post[names]
    chains = post.sizes.get("chain", 1)
    rh = az.rhat(sub) if chains > 1 else None
    eb = az.ess(sub, method="bulk")
    et = az.ess(sub, method="tail")

    def worst(ds, fn):
        vals = {}
        for v in ds.data_vars:
            arr = np.asarray(ds[v]).ravel()
            arr = arr[np.isfinite(arr)]
            if arr.size:
                vals[v] = float(fn(arr))
        return vals

    rvals = worst(rh, np.max) if rh is not None else {}
    bvals = worst(eb, np.min)
    tvals = worst(et, np.min)
    stats = tree["sample_stats"].to_dataset()
    div = int(np.asarray(stats["diverging"]).sum()) if "diverging" in stats else 0
    out = {
        "rhat_max": max(rvals.values()) if rvals else float("nan"),
        "ess_bulk_min": min(bvals.values()) if bvals else float("nan"),
        "ess_tail_min": min(tvals.values()) if tvals else float("nan"),
        "divergences": div,
        "thresholds": {
            "rhat_max": rhat_max,
            "ess_bulk_min": ess_min,
            "ess_tail_min": ess_min,
            "divergences": 0,
            "source": "Vehtari et al. (2021), Bayesian Analysis 16(2)",
        },
    }
    problems = []
    if rvals and out["rhat_max"] >= rhat_max:
        problems.append(f"R-hat {out['rhat_max']:.3f} >= {rhat_max} (worst: {max(rvals, key=rvals.get)})")
    if chains < 2:
        problems.append("one chain only: R-hat cannot be computed; run at least 2 chains")
    if out["ess_bulk_min"] < ess_min:
        problems.append(f"bulk ESS {out['ess_bulk_min']:.0f} < {ess_min} (worst: {min(bvals, key=bvals.get)})")
    if out["ess_tail_min"] < ess_min:
        problems.append(f"tail ESS {out['ess_tail_min']:.0f} < {ess_min} (worst: {min(tvals, key=tvals.get)})")
    if div > 0:
        problems.append(f"{div} divergent transition(s)")
    out["ok"] = not problems
    out["problems"] = problems
    out["advice"] = (
        ""
        if not problems
        else "; ".join(problems) + ". Run more draws (--draws) or chains (--chains), and read the "
        "posterior as unreliable until these pass."
    )
    return out


def warn_if_bad(diagnostics: dict) -> None:
    if not diagnostics.get("ok", True):
        warnings.warn("sampler diagnostics fail: " + diagnostics["advice"], DiagnosticsWarning, stacklevel=2)
