"""The one reader of run folders: files in, typed results out (:mod:`bayesdid.contracts`).

A run folder (``bayesdid fit``) holds ``summary.json``, ``manifest.json`` and ``posterior.nc``;
``checks/`` (``bayesdid checks --out RUN_DIR/checks`` or ``analyze``) holds ``checks.json`` and the CSV
tables declared in :data:`bayesdid.contracts.TABLE_COLUMNS`; ``sweep/`` (``bayesdid sweep --out
RUN_DIR/sweep``) holds ``verdict.json``, ``summary.csv`` and ``manifest.json``. Nothing here guesses a
key or a column: a file that lacks what its producer declares is refused with a
:class:`~bayesdid.errors.ReportError` naming the file, and so are checks or a sweep computed from
other data than the run (their ``data_sha256`` differs from the run's).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from ..contracts import (
    CHECK_NAMES,
    CheckSection,
    ContractError,
    CrossCheck,
    Diagnostics,
    EffectSummary,
    SweepVerdict,
    check_columns,
)
from ..errors import ReportError
from ..model.family import FAMILIES, FAMILY_RECORDS

__all__ = ["RunFolder", "FIT_COMMAND", "CHECKS_COMMAND", "SWEEP_COMMAND"]

CHECKS_COMMAND = "bayesdid checks STUDY.toml --out RUN_DIR/checks (or bayesdid analyze STUDY.toml --out RUN_DIR)"
#: `analyze` runs no sweep (only `demo` runs a short one), so the hint names the sweep command alone.
SWEEP_COMMAND = (
    "bayesdid sweep SWEEP.toml --out RUN_DIR/sweep (SWEEP.toml names the study and its variants; see the "
    "README's sweep section)"
)
FIT_COMMAND = "bayesdid fit STUDY.toml --out RUN_DIR"


def _load(path: Path, fix: str):
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise ReportError(f"'{path}' is not valid JSON ({exc.msg} at line {exc.lineno}); {fix}") from None


def _typed(cls, d, what: str, fix: str):
    try:
        return cls.from_dict(d, what=what)
    except ContractError as exc:
        raise ReportError(f"{exc} ({fix})") from None


class RunFolder:
    """The files of one run folder, read once into typed results. Optional parts absent are ``None``.

    Attributes: ``summary`` (dict, as written), ``effect`` and ``effect_percent``
    (:class:`EffectSummary`), ``natural`` (list of :class:`EffectSummary`), ``diagnostics``,
    ``cross_check``, ``manifest``, ``checks`` (name -> :class:`CheckSection`, or None),
    ``checks_meta`` (the rest of checks.json), ``verdict`` (:class:`SweepVerdict` or None),
    ``sweep_manifest``.

    Raises
    ------
    ReportError
        The folder or its summary.json is missing or malformed; checks or a sweep come from other
        data than the run.
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        if not self.path.is_dir():
            raise ReportError(
                f"run folder '{self.path}' does not exist; create it with `{FIT_COMMAND}` and "
                "pass that folder to `bayesdid report`."
            )
        sp = self.path / "summary.json"
        if not sp.is_file():
            raise ReportError(
                f"run folder '{self.path}' has no summary.json; it is not the output of a fit. "
                f"Run `{FIT_COMMAND}` and report that folder."
            )
        fix = f"rerun `{FIT_COMMAND}` to rewrite it."
        self.summary = _load(sp, fix)
        for key in ("effect", "data", "diagnostics"):
            if key not in self.summary:
                raise ReportError(f"'{sp}' lacks the '{key}' entry a fit writes; {fix}")
        s = self.summary
        fam = (s.get("model") or {}).get("family", "gaussian")
        if fam not in FAMILY_RECORDS:
            raise ReportError(f"'{sp}' names family '{fam}', not one of {list(FAMILIES)}; {fix}")
        #: the fitted family's record (:mod:`bayesdid.model.family`): scales, measures, captions
        self.family = FAMILY_RECORDS[fam]
        self.effect = _typed(EffectSummary, s["effect"], f"{sp}: 'effect'", fix)
        self.effect_percent = (
            _typed(EffectSummary, s["effect_percent"], f"{sp}: 'effect_percent'", fix)
            if "effect_percent" in s
            else None
        )
        nat = s.get("effect_natural") or []
        if not isinstance(nat, list):
            raise ReportError(f"'{sp}': 'effect_natural' should be a list of effects; {fix}")
        self.natural = [_typed(EffectSummary, e, f"{sp}: 'effect_natural'", fix) for e in nat]
        self.diagnostics = _typed(Diagnostics, s["diagnostics"], f"{sp}: 'diagnostics'", fix)
        self.cross_check = (
            _typed(CrossCheck, s["least_squares"], f"{sp}: 'least_squares'", fix)
            if isinstance(s.get("least_squares"), dict)
            else None
        )
        mp = self.path / "manifest.json"
        self.manifest = _load(mp, fix) if mp.is_file() else None
        self.identity = s.get("identity") or {
            "data_sha256": (self.manifest or {}).get("data_sha256"),
            "run_id": (self.manifest or {}).get("run_id"),
        }
        self._read_checks()
        self._read_sweep()
        self._tree = None  # posterior.nc, opened once on first use (see _posterior)
        self.posterior_opens = 0

    def _posterior(self):
        """posterior.nc as a lazily read DataTree, opened once for every figure; None when it is absent."""
        if self._tree is None:
            p = self.path / "posterior.nc"
            if not p.is_file():
                return None
            import xarray as xr

            self._tree = xr.open_datatree(p, engine="h5netcdf")
            self.posterior_opens += 1
        return self._tree

    def close(self) -> None:
        """Close posterior.nc if it was opened (the report does when the page is drawn)."""
        if self._tree is not None:
            self._tree.close()
            self._tree = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    # ---- checks ---------------------------------------------------------------------------------
    def _read_checks(self):
        self.checks = None
        self.checks_meta = None
        cp = self.path / "checks" / "checks.json"
        if not cp.is_file():
            return
        fix = f"rerun `{CHECKS_COMMAND}`."
        body = _load(cp, fix)
        self._same_data(body.get("identity") or {}, "checks/checks.json", CHECKS_COMMAND)
        self.checks = {}
        for name in CHECK_NAMES:
            if name in body:
                self.checks[name] = _typed(CheckSection, body[name], f"{cp}: '{name}'", fix)
        self.checks_meta = {k: v for k, v in body.items() if k not in CHECK_NAMES}

    def table(self, name: str) -> pd.DataFrame | None:
        """The declared CSV table ``checks/<name>.csv``, or None when the check did not write it."""
        p = self.path / "checks" / f"{name}.csv"
        if not p.is_file():
            return None
        df = pd.read_csv(p)
        try:
            return check_columns(name, df, where=str(p))
        except ContractError as exc:
            raise ReportError(str(exc)) from None

    # ---- sweep ----------------------------------------------------------------------------------
    def _read_sweep(self):
        self.verdict = None
        self.sweep_manifest = None
        vp = self.path / "sweep" / "verdict.json"
        if not vp.is_file():
            return
        fix = f"rerun `{SWEEP_COMMAND}`."
        mp = self.path / "sweep" / "manifest.json"
        self.sweep_manifest = _load(mp, fix) if mp.is_file() else {}
        self._same_data(self.sweep_manifest, "sweep/manifest.json", SWEEP_COMMAND)
        self.verdict = _typed(SweepVerdict, _load(vp, fix), str(vp), fix)

    def _same_data(self, other: dict, rel: str, command: str):
        mine = self.identity.get("data_sha256")
        theirs = other.get("base_data_sha256", other.get("data_sha256"))  # a sweep: its base study's table
        if isinstance(mine, str) and isinstance(theirs, str) and mine != theirs:
            raise ReportError(
                f"{rel} in '{self.path}' was computed from other data than the run: its table has SHA-256 "
                f"{theirs[:12]}..., the run's {mine[:12]}.... A report would mix results of two data sets; "
                f"rerun `{command}` with the run's study, or report each folder on its own."
            )

    # ---- posterior ------------------------------------------------------------------------------
    def cell_means(self):
        """The observed cell means and layout from posterior.nc, or None when it is absent.

        Returns a dict: ``mean`` (J, G, T) with NaN where a cell holds no rows, ``start`` (J,) index of
        each jurisdiction's first treated period (T for comparisons), ``jurisdictions``, ``groups``, ``periods``.
        """
        tree = self._posterior()
        if tree is None or "observed_data" not in tree or "constant_data" not in tree:
            return None
        obs = tree["observed_data"].to_dataset()
        const = tree["constant_data"].to_dataset()
        if "cell_mean" not in obs or "n" not in const or "start_index" not in const:
            return None
        mean = np.asarray(obs["cell_mean"].values, dtype=float)
        n = np.asarray(const["n"].values, dtype=float)
        return {
            "mean": np.where(n > 0, mean, np.nan),
            "start": np.asarray(const["start_index"].values),
            "jurisdictions": [str(v) for v in obs["jurisdiction"].values],
            "groups": [str(v) for v in obs["group"].values],
            "periods": [str(v) for v in obs["period"].values],
        }

    def worst_mixing(self, most: int = 4):
        """Ranks of the draws of the ``most`` worst-mixing sampled quantities (largest R-hat, then smallest
        bulk ESS), for rank plots: {label: (chains, draws) ranks}, or None without posterior.nc or with one
        chain."""
        tree = self._posterior()
        if tree is None:
            return None
        import arviz as az

        post = tree["posterior"].to_dataset().load()
        if post.sizes.get("chain", 1) < 2:
            return None
        rh = az.rhat(post)
        ess = az.ess(post, method="bulk")
        scored = []
        for v in post.data_vars:
            if v not in rh:
                continue
            r = np.asarray(rh[v].values, dtype=float).reshape(-1)
            e = np.asarray(ess[v].values, dtype=float).reshape(-1)
            dims = [d for d in post[v].dims if d not in ("chain", "draw")]
            for i in range(r.size):
                if not np.isfinite(r[i]):
                    continue
                idx = np.unravel_index(i, [post.sizes[d] for d in dims]) if dims else ()
                label = v + ("[" + ", ".join(str(post[d].values[k]) for d, k in zip(dims, idx)) + "]" if dims else "")
                scored.append((-r[i], e[i], label, v, dict(zip(dims, idx))))
        scored.sort(key=lambda t: (t[0], t[1]))
        out = {}
        for _, _, label, v, at in scored[:most]:
            x = np.asarray(post[v].isel(at).transpose("chain", "draw").values, dtype=float)
            order = np.argsort(x.reshape(-1), kind="stable")
            ranks = np.empty(x.size)
            ranks[order] = np.arange(x.size)
            out[label] = ranks.reshape(x.shape)
        return out

    def effect_draws(self):
        """Posterior draws of the headline ATT on the model scale (``att`` in posterior.nc), or None."""
        tree = self._posterior()
        if tree is None:
            return None
        post = tree["posterior"].to_dataset()
        if "att" not in post:
            return None
        return np.asarray(post["att"].values).reshape(-1)
