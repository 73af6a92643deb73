"""Benchmark ``compile``: what a model costs to compile cold, to load warm, and to sample.

Three models of the demo cases: the demo (DDD Gaussian, 40 jurisdictions x 2 groups x 12 periods,
``case_files/copay_cap``), the count demo (Poisson with exposure and covariates,
``case_files/nurse_line``) and the event-time model of the demo (``effects="event_time"``). Each is
fitted in a new process on an empty cache folder (cold: a real compile) and again in another new
process on the filled folder (warm: loaded from the cache); the last figure is the wall time of
``bayesdid fit`` on the demo study in a new process with the warm cache (imports, table, compile
load, sampling, cross-check, sensitivity, writing).

Per model the JSON line gives cold and warm compile seconds (wall and this process's CPU), the
sampling seconds, the op count of the compiled log density and gradient graph, and the cold compile's
stages: PyMC model construction, the graph work of nutpie (shapes, log density, rewrites, gradient),
PyTensor's compile of the two functions (rewrites and numba source), numba's typing and code
generation of the log density with its gradient and of the draw expansion (inside nutpie's C
callbacks, which also hold the wrappers), PyMC's initial-point function; and for the warm load:
fingerprint, load of the machine code, assembly. Targets (issue 13): cold at most 20 s and warm at
most 2 s per model, fit at most 10 s wall with a warm cache. The machine is shared: CPU seconds and
the load average are printed beside the wall seconds.

Run one model in this process (the worker): ``python -m bayesdid.bench.compile demo``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

__all__ = ["bench_compile", "MODELS"]

#: name -> (demo case, effects)
MODELS = {"demo": ("copay_cap", "att"), "count": ("nurse_line", "att"), "event_time": ("copay_cap", "event_time")}
ROOT = Path(__file__).resolve().parents[2]


class _Stages:
    """Wall seconds spent inside some library functions, by label (patched for one compile)."""

    def __init__(self):
        self.seconds: dict[str, float] = {}
        self._undo = []

    def wrap(self, owner, attr: str, label: str):
        orig = getattr(owner, attr)
        stages = self

        def timed(*a, **k):
            t0 = time.perf_counter()
            try:
                return orig(*a, **k)
            finally:
                stages.seconds[label] = stages.seconds.get(label, 0.0) + time.perf_counter() - t0

        setattr(owner, attr, timed)
        self._undo.append((owner, attr, orig))
        return orig

    def undo(self):
        for owner, attr, orig in reversed(self._undo):
            setattr(owner, attr, orig)


@contextmanager
def _stage_timers():
    import numba
    import nutpie.compile_pymc as ncp
    import pymc.initial_point
    import pymc.pytensorf
    import pytensor.graph

    from .. import modelcache

    st = _Stages()
    st.wrap(pymc.initial_point, "make_initial_point_fn", "initial_point_fn_s")
    st.wrap(ncp, "_compute_shapes", "nutpie_shapes_s")
    st.wrap(pytensor.graph, "rewrite_graph", "logp_rewrite_s")
    st.wrap(pymc.pytensorf, "compile", "pytensor_compile_s")
    st.wrap(modelcache, "fingerprint", "fingerprint_s")
    st.wrap(modelcache, "_functions_from", "load_machine_code_s")
    st.wrap(modelcache, "_assemble", "assemble_s")
    st.wrap(modelcache, "_write_entry", "write_entry_s")
    orig_cfunc = numba.cfunc

    def cfunc(sig, **kw):
        deco = orig_cfunc(sig, **kw)

        def apply(fn):
            t0 = time.perf_counter()
            try:
                return deco(fn)
            finally:
                label = "numba_expand_s" if "expand" in fn.__name__ else "numba_logp_grad_s"
                st.seconds[label] = st.seconds.get(label, 0.0) + time.perf_counter() - t0

        return apply

    numba.cfunc = cfunc
    try:
        yield st.seconds
    finally:
        numba.cfunc = orig_cfunc
        st.undo()


def run_one(name: str) -> dict:
    """Fit one model in this process through the compile cache and time its stages."""
    t_import = time.perf_counter()
    from .. import modelcache, sample
    from ..model.registry import build_model
    from ..model.terms import event_times_of, resolve_scales
    from ..run import prepare
    from ..study import load_study

    import_s = time.perf_counter() - t_import
    case, effects = MODELS[name]
    study = load_study(ROOT / "case_files" / case / "study.toml")
    cells, _, _ = prepare(study)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    family = study.model.family
    terms = {} if effects == "att" else {"effects": "event_time", "event_times": event_times_of(cells)}
    t0 = time.perf_counter()
    build_model(cells, scales, family, **terms)
    build_s = time.perf_counter() - t0
    sample.clear_cache()
    c0 = time.process_time()
    with _stage_timers() as stages:
        fit = sample.fit_cells(cells, scales, study.sampler, family=family, **terms)
    how = "compiled" if modelcache.STATS["compiled"] else "loaded"
    ops = None
    for compiled, _, _ in sample._CACHE.values():
        if getattr(compiled, "logp_func", None) is not None:
            ops = len(compiled.logp_func.maker.fgraph.apply_nodes)
    return {
        "model": name,
        "how": how,
        "compile_s": round(fit.timing["compile_s"], 2),
        "cpu_s": round(time.process_time() - c0, 2),
        "sample_s": round(fit.timing["sample_s"], 2),
        "ops_logp_grad": ops,
        "import_s": round(import_s, 2),
        "build_model_s": round(build_s, 2),
        "stages": {k: round(v, 2) for k, v in sorted(stages.items())},
        "draws": study.sampler.draws,
        "tune": study.sampler.tune,
        "chains": study.sampler.chains,
    }


def _child(args: list[str], cache: Path) -> tuple[subprocess.CompletedProcess, float]:
    env = {**os.environ, "BAYESDID_CACHE_DIR": str(cache)}
    env.pop("PYTENSOR_FLAGS", None)
    env.pop("NUMBA_CACHE_DIR", None)
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, *args], env=env, capture_output=True, text=True, cwd=ROOT)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(args)} failed: {proc.stderr[-2000:]}")
    return proc, wall


def bench_compile(*, quick: bool = False, models: tuple[str, ...] | None = None) -> dict:
    names = models or (("demo",) if quick else tuple(MODELS))
    out = {"bench": "compile", "quick": quick, "load_before": round(os.getloadavg()[0], 1), "models": {}}
    with tempfile.TemporaryDirectory(prefix="bayesdid-bench-compile-") as tmp:
        cache = Path(tmp) / "cache"
        for name in names:
            cold_p, cold_wall = _child(["-m", "bayesdid.bench.compile", name], cache)
            warm_p, warm_wall = _child(["-m", "bayesdid.bench.compile", name], cache)
            cold = json.loads(cold_p.stdout.strip().splitlines()[-1])
            warm = json.loads(warm_p.stdout.strip().splitlines()[-1])
            out["models"][name] = {
                "cold_compile_s": cold["compile_s"],
                "cold_how": cold["how"],
                "warm_compile_s": warm["compile_s"],
                "warm_how": warm["how"],
                "sampling_s": warm["sample_s"],
                "ops_logp_grad": cold["ops_logp_grad"],
                "cold_stages": cold["stages"],
                "warm_stages": warm["stages"],
                "cold_process_wall_s": round(cold_wall, 1),
                "warm_process_wall_s": round(warm_wall, 1),
                "build_model_s": cold["build_model_s"],
            }
        if "demo" in names:
            run = Path(tmp) / "run"
            _, wall = _child(
                [
                    "-m",
                    "bayesdid.cli",
                    "fit",
                    str(ROOT / "case_files" / "copay_cap" / "study.toml"),
                    "--out",
                    str(run),
                    "--quiet",
                ],
                cache,
            )
            out["fit_demo_warm_wall_s"] = round(wall, 1)
            timing = json.loads((run / "summary.json").read_text())["timing"]
            out["fit_demo_warm_timing"] = {k: round(v, 2) for k, v in timing.items()}
    out["load_after"] = round(os.getloadavg()[0], 1)
    out["targets"] = {"cold_compile_s": 20, "warm_compile_s": 2, "fit_demo_warm_wall_s": 10}
    return out


if __name__ == "__main__":
    print(json.dumps(run_one(sys.argv[1])))
