"""Helper process for tests/test_cache.py: fit a small simulated study in a fresh interpreter.

Usage: python tests/cache_worker.py SEED [FITS] [small]. The compile cache folder comes from the
environment (BAYESDID_CACHE_DIR). Prints one JSON line: how many models this process compiled, loaded
from the cache and found damaged, and a SHA-256 of every fit's draws (so two processes can be compared
bit for bit without shipping the draws).

By default it fits a small DiD study through ``bayesdid.sample.fit_cells`` (one compile: about a
minute of CPU). With ``small`` it fits a two-parameter PyMC model through the same cache
(``modelcache.compile_cached`` with ``sample.compile_exact``, sampled by nutpie: a compile of a few
seconds), for the tests of what the cache does with any model (damaged entries, unwritable folders).
"""

from __future__ import annotations

import hashlib
import json
import sys
import tempfile
import warnings
from pathlib import Path


def _small_fit(seed: int) -> dict:
    """Draws of a two-parameter model compiled through the cache (see the module docstring)."""
    import numpy as np
    import nutpie
    import pymc as pm

    from bayesdid import sample
    from bayesdid.modelcache import compile_cached

    with pm.Model(check_bounds=False) as model:
        y = pm.Data("y", np.array([0.3, -0.2, 0.9, 0.4, 0.1]))
        mu = pm.Normal("mu", 0.0, 1.0)
        sd = pm.HalfNormal("sd", 1.0)
        pm.Normal("obs", mu, sd, observed=y)
    compiled, how = compile_cached(model, sample.compile_exact)
    sample.COMPILES["count"] += how == "compiled"
    sample.LOADS["count"] += how == "loaded"
    tree = nutpie.sample(compiled, draws=200, tune=200, chains=2, cores=1, seed=seed, progress_bar=False)
    post = tree["posterior"].to_dataset()
    return {name: post[name].to_numpy() for name in sorted(post.data_vars)}


def main() -> None:
    seed = int(sys.argv[1])
    fits = int(sys.argv[2]) if len(sys.argv) > 2 else 1
    small = len(sys.argv) > 3 and sys.argv[3] == "small"
    from bayesdid import sample
    from bayesdid.cells import collapse
    from bayesdid.model.terms import resolve_scales
    from bayesdid.modelcache import STATS
    from bayesdid.simulate import Scenario, simulate
    from bayesdid.study import SamplerSettings, make_study

    sc = Scenario(jurisdictions=6, periods=4, groups=1, starts={0: 2}, rows_per_cell=5)
    frame, truth = simulate(sc, 1)
    table = Path(tempfile.mkdtemp()) / "x.csv"
    st = make_study(table=table, outcome="y", jurisdiction="region", period="period", adopters=truth["starts"])
    cells = collapse(st, frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, st.priors).items()}
    digests = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for i in range(fits):
            if i:
                sample.clear_cache()  # a new fit in this process goes back to the cache as a new process would
            if small:
                arrays = _small_fit(seed)
            else:
                fit = sample.fit_cells(cells, scales, SamplerSettings(chains=2, draws=100, tune=100, seed=seed))
                arrays = {name: fit.posterior[name].to_numpy() for name in sorted(fit.posterior.data_vars)}
            h = hashlib.sha256()
            for name, arr in arrays.items():
                h.update(name.encode() + arr.tobytes())
            digests.append(h.hexdigest())
    cache_warnings = [str(w.message) for w in caught if type(w.message).__name__ == "CacheWarning"]
    print(
        json.dumps(
            {
                "compiles": sample.COMPILES["count"],
                "loads": sample.LOADS["count"],
                **STATS,
                "draws": digests,
                "cache_warnings": cache_warnings,
            }
        )
    )


if __name__ == "__main__":
    main()
