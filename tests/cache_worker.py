"""Helper process for tests/test_cache.py: fit a small simulated study in a fresh interpreter.

Usage: python tests/cache_worker.py SEED [FITS]. The compile cache folder comes from the environment
(BAYESDID_CACHE_DIR). Prints one JSON line: how many models this process compiled, loaded from the
cache and found damaged, and a SHA-256 of every fit's draws (so two processes can be compared bit for
bit without shipping the draws).
"""

from __future__ import annotations

import hashlib
import json
import sys
import tempfile
import warnings
from pathlib import Path


def main() -> None:
    seed = int(sys.argv[1])
    fits = int(sys.argv[2]) if len(sys.argv) > 2 else 1
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
            fit = sample.fit_cells(cells, scales, SamplerSettings(chains=2, draws=100, tune=100, seed=seed))
            h = hashlib.sha256()
            for name in sorted(fit.posterior.data_vars):
                h.update(name.encode() + fit.posterior[name].to_numpy().tobytes())
            digests.append(h.hexdigest())
    cache_warnings = [str(w.message) for w in caught if type(w.message).__name__ == "CacheWarning"]
    print(json.dumps({"compiles": sample.COMPILES["count"], "loads": sample.LOADS["count"], **STATS,
                      "draws": digests, "cache_warnings": cache_warnings}))


if __name__ == "__main__":
    main()
