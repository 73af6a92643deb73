"""A notebook-friendly face of bayesdid: a study from a DataFrame, effects as xarray, figures as
matplotlib figures.

::

    import bayesdid.notebook as bn
    study = bayesdid.make_study(table=frame, outcome="visits", jurisdiction="region", period="quarter",
                                adopters={"Norvale": "2024Q1"})
    res = bn.fit(study)                 # or bn.Result(bayesdid.analyse(study))
    res.effects                         # xarray.Dataset: att, tau_adopter, natural-scale measures
    res.effects["att"].quantile([0.05, 0.95])
    res.figures()["effect"]             # the report's figures, by section, as matplotlib figures
    res.headline                        # the report's headline sentence

Figures are drawn by the report's own code from the run folder the result writes (into a temporary
folder unless ``folder`` is given), so a notebook shows exactly what the HTML report shows.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import xarray as xr

from .run import Analysis, analyse, write_run

__all__ = ["Result", "fit"]


class Result:
    """One fitted study, for interactive use."""

    def __init__(self, analysis: Analysis, *, folder: str | Path | None = None):
        self.analysis = analysis
        self._folder = Path(folder) if folder is not None else None
        self._tmp = None

    # ---- numbers ----------------------------------------------------------------------------------
    @property
    def effects(self) -> xr.Dataset:
        """``att`` (chain, draw), ``tau_adopter`` (chain, draw, adopter) on the model scale, and one
        variable per natural-scale measure (``effect_natural`` of summary.json), named by the measure."""
        post = self.analysis.fit.posterior
        C, D = post.sizes["chain"], post.sizes["draw"]
        from .effects import att_draws

        ds = xr.Dataset(
            {"att": att_draws(post["tau_adopter"], self.analysis.cells), "tau_adopter": post["tau_adopter"]}
        )
        ds["att"].attrs = {"scale": "model", "meaning": "sum_j w_j tau_adopter[j], w_j: share of treated rows"}
        for e in self.analysis.effects.natural:
            name = e.measure
            if name in ds or np.size(e.draws) != C * D:
                continue
            ds[name] = (("chain", "draw"), np.asarray(e.draws, dtype=float).reshape(C, D))
            ds[name].attrs = {"scale": "natural", "measure": e.measure}
        return ds

    @property
    def summary(self) -> dict:
        return self.analysis.summary()

    # ---- files and figures ------------------------------------------------------------------------
    @property
    def folder(self) -> Path:
        """The run folder (written on first use)."""
        if self._folder is None:
            self._tmp = tempfile.TemporaryDirectory(prefix="bayesdid-notebook-")
            self._folder = Path(self._tmp.name) / "run"
        if not (self._folder / "summary.json").is_file():
            write_run(self.analysis, self._folder)
        return self._folder

    @property
    def headline(self) -> str:
        import json

        from .report.words import headline_of

        m = json.loads((self.folder / "manifest.json").read_text())
        return headline_of(self.summary, m.get("study"))

    def figures(self) -> dict:
        """The report's figures as matplotlib figures: section anchor -> Figure (a second figure of a
        section is ``<anchor>-2``, and so on). Checks and sweeps written into :attr:`folder` show too."""
        from .report import plots
        from .report.html import render_report

        with plots.collect_figures() as got:
            render_report(self.folder)
        out, seen = {}, {}
        for section, fig in got:
            seen[section] = seen.get(section, 0) + 1
            out[section if seen[section] == 1 else f"{section}-{seen[section]}"] = fig
        return out

    def __repr__(self) -> str:
        e = self.analysis.effects.effect.summary
        return f"<bayesdid Result: ATT median {e['median']:.4g}, 90% interval {e['eti_90'][0]:.4g} to {e['eti_90'][1]:.4g}>"


def fit(study, **kwargs) -> Result:
    """:func:`bayesdid.analyse` the study and wrap the analysis in a :class:`Result`."""
    return Result(analyse(study, **kwargs))
