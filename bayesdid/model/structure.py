"""How the gap noise behaves over periods: the structure a study asks for and the one fitted.

The gap noise e[j,t] (DDD: of the target-minus-reference gap; DiD: of the jurisdiction-period) is,
within each jurisdiction, either

* ``"persistent"`` (the default): a stationary AR(1) over the periods in their order,
  ``e[j,t] = rho e[j,t-1] + u[j,t]``, ``u ~ Normal(0, sigma_gap^2 (1 - rho^2))``, ``e[j,0] ~
  Normal(0, sigma_gap^2)``, one correlation rho shared by all jurisdictions, learned; or
* ``"independent"``: independent over periods (the special case rho = 0).

Jurisdiction-level outcomes are persistent: a place above its usual level this year tends to be
above it next year (Bertrand, Duflo and Mullainathan 2004, QJE 119(1)). A model that treats periods
as independent lets the baselines absorb the persistent part and learns too small a gap noise, so
its intervals are too narrow exactly when the stakes are highest (one or few adopters).

Prior on rho: ``(rho + 1) / 2 ~ Beta(2.5, 1.5)`` (the two numbers are data containers
``prior_rho_a`` and ``prior_rho_b``). It is weakly informative: its mean is rho = 0.25 and its
central 90% runs from about -0.53 to 0.88, so it leans toward the positive persistence that
state and regional panels show while leaving negative values possible; its density goes to zero
at +-1, which keeps the sampler away from the non-stationary edge where sigma_gap and the
baselines stop being separately identified.

The DDD's shared jurisdiction-period shock s[j,t] stays independent over periods: the triple
difference removes it (both groups of a jurisdiction-period share it), so its persistence cannot
bias the effect or its interval; it only decides how the reference group's cells inform the
target group's, and modelling its serial correlation would cost a second correlation that the data
barely identify.

Rule: persistence needs periods before the policy to be learned and to separate a persistent gap
from the effect. With fewer than :data:`MIN_PRE_PERIODS` pre-policy periods (counted for the adopter
that starts first) the independent form is fitted, with a :class:`~bayesdid.errors.PersistenceFallbackWarning`
that names the reason; the reason is recorded in summary.json.

How large the gap noise is across jurisdictions (``model.gap_scale``):

* ``"per_jurisdiction"`` (an option; ``"shared"``, one scale for all, is the default): each jurisdiction j has its own scale, partially pooled on
  the log scale (non-centred), ``log sigma_gap_j = log sigma_gap + omega z_j``, ``z = Q u``,
  ``u ~ Normal(0, I_{J-1})`` with Q the orthonormal zero-sum basis (so ``z_j ~ Normal(0, (J-1)/J)``,
  summing to zero), ``omega ~ HalfNormal(OMEGA_SCALE)``; sigma_gap keeps its meaning as the typical
  scale, exactly the geometric mean of the jurisdictions' scales, and
  sigma_gap_j replaces it in the law of jurisdiction j's gap noise (either form over periods, every
  family). Jurisdictions differ in noise (small places have few events or few respondents, so their
  outcome is noisier): with one shared scale the interval of a noisy adopter is too narrow and
  placebo laws in noisy places come out "significant" (the castle-doctrine placebo study: every false
  positive was in one of the 4 noisiest of 29 states). An adopter's scale is learned from its own
  periods (before and after the policy) and pooled toward the others' like any jurisdiction's.
  The zero-sum z removes the ridge between log sigma_gap and the mean of the z_j (with free z_j
  only their sum with log sigma_gap is identified): on a castle placebo law it raised sigma_gap's
  bulk ESS from 350 to 455 over 2 x 1,000 draws.
* ``"shared"``: one scale sigma_gap for all (the special case omega = 0).

Prior on omega: HalfNormal(0.5) on the log scale. Its median, 0.34, puts a typical pair of
jurisdictions' scales a factor of exp(0.34 sqrt(2) 0.67) ~ 1.4 apart, and its 95% quantile, 0.98,
allows the noisiest of 30 jurisdictions to be about exp(0.98 * 2) ~ 7 times the median: weakly
informative on the log scale (common practice for a spread of log scales: unit-scale differences are
already large). It keeps omega away from implausibly large spreads that a handful of periods per
jurisdiction cannot rule out.

Rule: a jurisdiction's scale is learned from the spread of its gap over periods around its own
level, T - 1 degrees of freedom, and omega from how those spreads differ across jurisdictions. With
fewer than :data:`MIN_SCALE_PERIODS` periods (at most one deviation per jurisdiction: a variance
estimate with a relative sd of sqrt(2 / 1), 141%) or fewer than :data:`MIN_SCALE_JURISDICTIONS`
jurisdictions (too few spreads to learn how they differ; omega would rest on its prior) the shared
scale is fitted, with a :class:`~bayesdid.errors.PersistenceFallbackWarning` naming the reason,
recorded in summary.json.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass

import numpy as np

from ..errors import PersistenceFallbackWarning

__all__ = [
    "GAP_FORMS",
    "MIN_PRE_PERIODS",
    "RHO_PRIOR",
    "MIN_WITHIN_DF",
    "GapStructure",
    "resolve_gap",
    "gap_structure",
    "rho_prior_logpdf",
    "residual_rule",
    "GAP_SCALES",
    "OMEGA_SCALE",
    "MIN_SCALE_PERIODS",
    "MIN_SCALE_JURISDICTIONS",
    "gap_scale_draws",
    "gap_scale_terms",
    "omega_prior_logpdf",
]

#: Study-file values of ``model.gap_over_time``.
GAP_FORMS = ("persistent", "independent")
#: Fewest pre-policy periods with which the persistent form is fitted.
MIN_PRE_PERIODS = 3
#: Beta(a, b) prior on (rho + 1) / 2, see the module docstring.
RHO_PRIOR = {"a": 2.5, "b": 1.5}
#: Study-file values of ``model.gap_scale``.
GAP_SCALES = ("per_jurisdiction", "shared")
#: Scale of the half-normal prior on omega, the spread of the log gap-noise scales (module docstring).
OMEGA_SCALE = 0.5
#: Fewest periods and jurisdictions with which the per-jurisdiction scale is fitted.
MIN_SCALE_PERIODS = 3
MIN_SCALE_JURISDICTIONS = 5


@dataclass(frozen=True)
class GapStructure:
    """The gap noise's structure over periods as fitted, with what was asked and why they differ."""

    over_time: str = "persistent"
    requested: str = "persistent"
    fallback: str | None = None
    drift: bool = False
    #: How large the gap noise is across jurisdictions as fitted: "per_jurisdiction" or "shared".
    scale: str = "shared"
    scale_requested: str = "shared"
    scale_fallback: str | None = None

    def to_dict(self) -> dict:
        out = asdict(self)
        out["meaning"] = (
            "gap noise follows a stationary AR(1) over periods within each jurisdiction, one correlation "
            f"rho shared by all, prior (rho + 1)/2 ~ Beta({RHO_PRIOR['a']:g}, {RHO_PRIOR['b']:g})"
            if self.over_time == "persistent"
            else "gap noise independent over periods"
        ) + (
            "; each jurisdiction has its own gap-noise scale, log sigma_gap_j = log sigma_gap + omega z_j, "
            f"z zero-sum standard normal over jurisdictions, omega ~ HalfNormal({OMEGA_SCALE:g}) (sigma_gap is "
            "the typical scale, the geometric mean of the jurisdictions')"
            if self.scale == "per_jurisdiction"
            else "; one gap-noise scale sigma_gap shared by all jurisdictions"
        )
        return out


def pre_periods(cells) -> int:
    """Number of periods before the first adopter's start (0 when nobody adopts)."""
    ad = cells.adopters
    return int(np.min(cells.start[ad])) if len(ad) else 0


def _resolve_scale(cells, requested: str, warn: bool) -> dict:
    if requested not in GAP_SCALES:
        raise ValueError(f"gap scale must be one of {GAP_SCALES}, got {requested!r}")
    out = {"scale": requested, "scale_requested": requested}
    if requested == "shared":
        return out
    J, _, T = cells.shape
    why = None
    if T < MIN_SCALE_PERIODS:
        why = f"the panel has {T} period(s), fewer than {MIN_SCALE_PERIODS}"
    elif J < MIN_SCALE_JURISDICTIONS:
        why = f"the panel has {J} jurisdiction(s), fewer than {MIN_SCALE_JURISDICTIONS}"
    if why is None:
        return out
    reason = (
        f"{why}: each jurisdiction's own gap-noise scale (and how much they differ) cannot be learned, so "
        "one scale is shared by all jurisdictions (model.gap_scale = 'shared'); a noisy adopter's "
        "interval may be too narrow."
    )
    if warn:
        warnings.warn(reason, PersistenceFallbackWarning, stacklevel=3)
    return {"scale": "shared", "scale_requested": requested, "scale_fallback": reason}


def resolve_gap(
    cells,
    requested: str = "persistent",
    drift: bool = False,
    *,
    scale: str = "shared",
    warn: bool = True,
) -> GapStructure:
    """The structure fitted for ``requested``: the persistent form falls back to the independent one
    when the first adopter has fewer than :data:`MIN_PRE_PERIODS` pre-policy periods; the
    per-jurisdiction scale falls back to the shared one on fewer than :data:`MIN_SCALE_PERIODS`
    periods or :data:`MIN_SCALE_JURISDICTIONS` jurisdictions."""
    if requested not in GAP_FORMS:
        raise ValueError(f"gap form must be one of {GAP_FORMS}, got {requested!r}")
    sc = _resolve_scale(cells, scale, warn)
    if requested == "persistent":
        k = pre_periods(cells)
        if k < MIN_PRE_PERIODS:
            reason = (
                f"the first adopter has {k} pre-policy period(s), fewer than {MIN_PRE_PERIODS}: the "
                "correlation of the gap noise over periods (rho) cannot be learned apart from the effect, "
                "so the gap noise is fitted as independent over periods (model.gap_over_time = "
                "'independent'); its intervals may be too narrow if the outcome is persistent."
            )
            if warn:
                warnings.warn(reason, PersistenceFallbackWarning, stacklevel=2)
            return GapStructure(over_time="independent", requested=requested, fallback=reason, drift=drift, **sc)
    return GapStructure(over_time=requested, requested=requested, drift=drift, **sc)


def gap_structure(cells) -> GapStructure:
    """The structure recorded on ``cells`` by the collapse (``cells.extra["gap"]``), or the default
    (persistent, with its fallback rule, silently) for cells built without a study."""
    g = cells.extra.get("gap") if cells.extra else None
    if isinstance(g, GapStructure):
        return g
    return resolve_gap(cells, warn=False)  # the defaults: persistent, per-jurisdiction scale


def gap_scale_terms(S: dict, scale: str = "shared", J: int = 0):
    """PyMC (inside a model): ``sigma_gap`` and the gap-noise scale of each jurisdiction.

    ``"per_jurisdiction"``: ``omega ~ HalfNormal(OMEGA_SCALE)``, ``z_gap_scale ~ Normal(0, 1)`` of
    length J - 1, ``z = Q z_gap_scale`` (zero-sum over the J jurisdictions) and the deterministic
    ``sigma_gap_j = sigma_gap exp(omega z)``, returned as (J,). ``"shared"``: ``sigma_gap`` itself (a scalar), so the shared model's graph is unchanged."""
    import pymc as pm
    import pytensor.tensor as pt

    sigma_gap = pm.HalfNormal("sigma_gap", S["gap_noise"])
    if scale != "per_jurisdiction":
        return sigma_gap, sigma_gap
    omega = pm.HalfNormal("omega", OMEGA_SCALE)
    z_raw = pm.Normal("z_gap_scale", 0.0, 1.0, shape=(J - 1,))
    z = small_matmul(z_raw, zero_sum_basis(J).T)  # zero-sum: sigma_gap is the scales' geometric mean
    sj = pm.Deterministic("sigma_gap_j", sigma_gap * pt.exp(omega * z), dims=("jurisdiction",))
    return sigma_gap, sj


def gap_scale_draws(fit) -> np.ndarray:
    """Draws of each jurisdiction's gap-noise scale, shape (S, J): ``sigma_gap_j`` when the fit has a
    per-jurisdiction scale, else ``sigma_gap`` repeated over jurisdictions. Every reader that works per
    jurisdiction takes its scale from here."""
    if getattr(fit.spec, "gap_scale", "shared") == "per_jurisdiction":
        return np.asarray(fit.draws("sigma_gap_j"), dtype=float)
    sg = np.asarray(fit.draws("sigma_gap"), dtype=float)
    return np.repeat(sg[:, None], fit.cells.shape[0], axis=1)


def omega_prior_logpdf(omega: np.ndarray, scale: float = OMEGA_SCALE) -> np.ndarray:
    """Log density of omega under HalfNormal(scale)."""
    from scipy import stats

    return stats.halfnorm.logpdf(np.asarray(omega), scale=scale)


def rho_prior_logpdf(rho: np.ndarray, a: float = RHO_PRIOR["a"], b: float = RHO_PRIOR["b"]) -> np.ndarray:
    """Log density of rho under ``(rho + 1)/2 ~ Beta(a, b)`` (the Jacobian 1/2 included)."""
    from scipy import stats

    return stats.beta.logpdf((np.asarray(rho) + 1.0) / 2.0, a, b) - np.log(2.0)


#: Fewest within-cell degrees of freedom, sum over cells of (n - 1), with which the residual sd is fitted.
MIN_WITHIN_DF = 30


def residual_rule(cells) -> dict:
    """Whether the Gaussian model gets a separate residual sd, and why.

    The rows of a cell inform the residual sd only through their spread around the cell mean, whose
    degrees of freedom are sum over cells of (n - 1). With one row per cell (the usual shape of
    state-year data) that is 0, and the residual sd and the gap noise enter the likelihood only as
    the sum sigma^2 / n + sigma_gap^2: a ridge the sampler cannot cross (R-hat 1.10 seen on a
    state panel). Below :data:`MIN_WITHIN_DF` degrees of freedom the estimate of sigma would rest on
    very few spreads (its relative sd is about 1 / sqrt(2 df), over 13% below 30: common practice
    for a variance's small-sample error), so the model leaves it out: the cell means alone carry the
    likelihood and the gap noise (and, in a DDD, the shared shock) absorbs the rows' own noise.
    The rule reads the cell counts only, so placebos and dropped jurisdictions keep one structure.
    """
    n = np.asarray(cells.n, dtype=float)
    df = float(np.maximum(n - 1.0, 0.0).sum())
    separate = df >= MIN_WITHIN_DF
    out = {"separate": bool(separate), "within_cell_df": int(df), "threshold": MIN_WITHIN_DF}
    if not separate:
        out["reason"] = (
            f"the cells hold {int(df)} within-cell degree(s) of freedom (sum of rows - 1 over cells), "
            f"fewer than {MIN_WITHIN_DF}: the residual sd is not identified apart from the gap noise, "
            "so it is left out and the gap noise absorbs the rows' own noise (the fit uses the cell "
            "means alone)."
        )
    return out


def zero_sum_basis(T: int) -> np.ndarray:
    """Orthonormal (T, T-1) basis of the vectors that sum to zero.

    Period effects are h = Q r with r ~ Normal(0, s^2 I), so h ~ Normal(0, s^2 (I - 11'/T)): an
    exchangeable prior over periods, identified against the baselines (which then carry the mean
    level over time) without the ridge that pinning one period to zero creates.
    """
    M = np.eye(T) - 1.0 / T
    u, _, _ = np.linalg.svd(M)
    return u[:, : T - 1]


def small_matmul(x, M: np.ndarray):
    """``x @ M`` for a small constant matrix ``M``, as a broadcast product and sum.

    Written without a BLAS call: BLAS kernels may round differently with the memory alignment of
    their operands, which differs between processes, and sampling amplifies a last-bit difference
    into different draws; the sweep and calibration promise the same draws for the same seed in any
    worker.
    """
    import pytensor.tensor as pt

    return (x[..., :, None] * pt.as_tensor(np.asarray(M, dtype=float))).sum(axis=-2)
