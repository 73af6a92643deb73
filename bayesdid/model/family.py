"""The family records: one per outcome family, everything the rest of the program asks of a family.

Modules outside ``bayesdid/model/`` never compare a family's name; they ask its :class:`Family`
record (``family_record(name)``) what they need: which sufficient statistics the cells keep, which
column sizes a row (trials, exposure), whether the effect is read as a ratio, the label of each
scale and natural-scale measure, which options and priors the family has. ``tests/test_house.py``
fails on a family name compared or used as a key outside ``model/``.

The records hold no PyMC and import nothing of the package, so every layer can read them (the study
file and the data checks sit below the model). The builders, log-likelihoods and data arrays of each
family dispatch on these records in :mod:`bayesdid.model.registry` (the model floor), which
re-exports them: the registry is the one place a family is described.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Family", "FAMILY_RECORDS", "FAMILIES", "family_record"]

#: Options of the study file that only the cell model (exact on the cells' moment sums) supports.
CELL_OPTIONS = ("log_outcome", "gap_drift", "unit", "weight")


@dataclass(frozen=True)
class Family:
    """What one outcome family is, for every part of the program that reads a study or a run.

    ``cell_model``: the likelihood is exact on each cell's moment sums (rows, mean, within-cell sum of
    squares), the jurisdiction-period shock and gap noise integrated out; otherwise it is evaluated on
    records (cell, summed outcome, summed size, covariate pattern) with both as latent fields.
    ``size_role``: the study key naming each row's size (``"trials"``, ``"exposure"``) or None;
    ``size_required``: whether that key must be given (binomial rows without trials are 0/1 outcomes).
    """

    name: str
    link: str  # "identity", "logit" or "log"
    cell_model: bool
    size_role: str | None
    size_required: bool
    outcome_word: str  # what one row's outcome holds: "values", "successes", "counts"
    summary: str  # the value of data.summary whose rows this family reads ("mean", "proportion", "rate")
    extra_priors: tuple[str, ...]  # priors beyond the shared ones (model.registry)
    natural_measures: tuple[str, ...]
    natural_caption: str  # how the natural-scale table is computed, for the report
    link_label: str = ""  # the link scale's name ("log odds", "log rate"); "" for identity
    ratio_name: str = ""  # the ratio exp(link difference) reads as ("odds ratio", "rate ratio")
    cell_quantity: str = ""  # what least squares on the cells regresses ("proportions", "rates")
    #: (measure, factor, axis): the natural measure that least squares on the cells' proportions or rates
    #: estimates, the factor from the least-squares estimate to that measure, and its axis label
    difference_scale: tuple[str, float, str] | None = None
    #: tau on the model scale, for the effect table (None: outcome units, or log outcome)
    model_measure: str | None = None
    options: tuple[str, ...] = field(default=())

    @property
    def ratio_scale(self) -> bool:
        """The effect is a difference on a log or logit link, read as a ratio: a decision threshold is
        a relative change, taken to the model scale as log(1 + t)."""
        return self.link != "identity"

    def allows(self, option: str) -> bool:
        """Whether the study option (one of :data:`CELL_OPTIONS`) is built for this family."""
        return option in self.options

    def link_location(self, y_total: float, size_total: float) -> float:
        """The link-scale centre of the outcome (the cells' ``outcome_mean``) from its total and total size:
        the log odds of the overall proportion, or the log of the overall rate, kept off the bounds."""
        Y, N = float(y_total), float(size_total)
        if self.link == "logit":
            p = min(max(Y / N, 0.5 / N), 1 - 0.5 / N)
            return float(np.log(p / (1 - p)))
        if self.link == "log":
            return float(np.log(max(Y, 0.5) / N))
        raise ValueError(f"family '{self.name}' has no link location (identity link)")

    def natural(self, m1: np.ndarray, m0: np.ndarray, total_size: float) -> list[tuple[str, str, np.ndarray]]:
        """Natural-scale draws from the size-weighted mean predictions with (``m1``) and without
        (``m0``) the policy over the treated records, in :attr:`natural_measures` order: a list of
        (measure, ``"ratio"`` or ``"difference"``, draws). See :func:`bayesdid.effects.natural_effects`."""
        if self.link == "logit":
            return [
                (self.natural_measures[0], "difference", 100.0 * (m1 - m0)),
                (self.natural_measures[1], "ratio", m1 / m0),
            ]
        if self.link == "log":
            return [
                (self.natural_measures[0], "ratio", m1 / m0),
                (self.natural_measures[1], "difference", 1000.0 * (m1 - m0)),
                (self.natural_measures[2], "difference", 1000.0 * (m0 - m1)),
                (self.natural_measures[3], "difference", total_size * (m0 - m1)),
            ]
        raise ValueError(f"family '{self.name}' has no counterfactual natural measures (identity link)")


_COUNTS_NATURAL = (
    "rate ratio",
    "rate difference per 1,000 units of exposure",
    "events averted per 1,000 units of exposure",
    "events averted in the treated cells (total)",
)
_RECORDS_CAPTION = (
    "From counterfactual predictions over the treated cells (with and without the policy, "
    "each draw), averaged with the cells' own {size}."
)
_COUNTS = dict(
    link="log",
    cell_model=False,
    size_role="exposure",
    size_required=True,
    outcome_word="counts",
    summary="rate",
    natural_measures=_COUNTS_NATURAL,
    natural_caption=_RECORDS_CAPTION.format(size="exposure"),
    link_label="log rate",
    ratio_name="rate ratio",
    cell_quantity="rates",
    difference_scale=(_COUNTS_NATURAL[1], 1000.0, "rate difference per 1,000 units of exposure"),
    model_measure="difference in log rate (log rate ratio), conditional on cell and covariates",
)

FAMILY_RECORDS: dict[str, Family] = {
    f.name: f
    for f in (
        Family(
            name="gaussian",
            link="identity",
            cell_model=True,
            size_role=None,
            size_required=False,
            outcome_word="values",
            summary="mean",
            extra_priors=("residual",),
            natural_measures=("the ATT in outcome units, or the percent change exp(ATT) - 1 for a log outcome",),
            natural_caption=(
                "The model is linear in the outcome, so its natural scale is the model scale: the ATT "
                "in outcome units, or for a log outcome the percent change exp(ATT) - 1."
            ),
            options=CELL_OPTIONS,
        ),
        Family(
            name="binomial",
            link="logit",
            cell_model=False,
            size_role="trials",
            size_required=False,
            outcome_word="successes",
            summary="proportion",
            extra_priors=(),
            natural_measures=("risk difference, percentage points", "risk ratio"),
            natural_caption=_RECORDS_CAPTION.format(size="trials"),
            link_label="log odds",
            ratio_name="odds ratio",
            cell_quantity="proportions",
            difference_scale=("risk difference, percentage points", 100.0, "risk difference (percentage points)"),
            model_measure="difference in log odds (log odds ratio), conditional on cell and covariates",
        ),
        Family(name="poisson", extra_priors=(), **_COUNTS),
        Family(name="negbinomial", extra_priors=("dispersion",), **_COUNTS),
    )
}
#: The family names the study file accepts (``model.family``), in the order they are listed.
FAMILIES = tuple(FAMILY_RECORDS)


def family_record(name: str) -> Family:
    """The record of a family; a clear error for an unknown name (the study file refuses those first)."""
    try:
        return FAMILY_RECORDS[name]
    except KeyError:
        raise ValueError(f"unknown family '{name}'; choose one of {list(FAMILIES)}") from None


def families_allowing(option: str) -> str:
    """The families that support a study option, quoted for a message: ``'gaussian'``."""
    return " or ".join(repr(n) for n, f in FAMILY_RECORDS.items() if f.allows(option))


def families_reading(summary: str) -> tuple[str, ...]:
    """The families whose rows a summarised table (``data.summary``) of this kind gives."""
    return tuple(n for n, f in FAMILY_RECORDS.items() if f.summary == summary)
