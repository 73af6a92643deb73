"""Child process of ``bayesdid bench collapse --large``: stream-collapse a folder, save the cells and
this process's peak memory. Run as ``python -m bayesdid.bench.large_child FOLDER ADOPTERS CLUSTER OUT``;
it imports only the streaming collapse, so the peak is the collapse's own."""

from __future__ import annotations

import json
import resource
import sys
import time

import numpy as np

from ..stream import collapse_stream
from ..study import make_study


def run(folder: str, adopters: dict, cluster: str | None, out: str) -> None:
    study = make_study(
        table=folder,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=adopters,
    )
    t0 = time.perf_counter()
    cells, _ = collapse_stream(study, cluster=cluster)
    seconds = time.perf_counter() - t0
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux
    np.savez(out, n=cells.n, sum_y=cells.sum_y, ss=cells.ss, seconds=seconds, peak_kb=peak_kb, rows=cells.rows)


if __name__ == "__main__":
    run(sys.argv[1], json.loads(sys.argv[2]), sys.argv[3] or None, sys.argv[4])
