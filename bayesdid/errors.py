"""Exceptions and warnings of bayesdid.

Every error raised at the boundary (study file, table, command line) is a subclass of
:class:`BayesDidError`; the command line turns it into exit code 2 and a one-paragraph message.
Messages state what was expected, what was found and how to fix it.
"""

from __future__ import annotations

__all__ = [
    "BayesDidError",
    "StudyError",
    "DataRoleError",
    "SweepError",
    "ReportError",
    "OutputError",
    "PlanError",
    "BayesDidWarning",
    "FewAdoptersWarning",
    "DiagnosticsWarning",
    "RowLevelFallbackWarning",
    "SparseJurisdictionWarning",
    "CacheWarning",
]


class BayesDidError(Exception):
    """Base class of every error bayesdid raises on bad input."""


class StudyError(BayesDidError, ValueError):
    """The study file (or the equivalent Python arguments) is malformed or inconsistent."""


class DataRoleError(BayesDidError, ValueError):
    """The table does not fit the roles the study gives its columns."""


class SweepError(BayesDidError, ValueError):
    """The sweep file is malformed or a variant cannot be built."""


class ReportError(BayesDidError, ValueError):
    """A run folder cannot be reported: it is missing or lacks the files a fit writes."""


class OutputError(BayesDidError, ValueError):
    """The output folder cannot be written, or writing it would replace something bayesdid did not write."""


class PlanError(BayesDidError, ValueError):
    """The plan file (assurance before the data) is malformed or inconsistent."""


class BayesDidWarning(UserWarning):
    """Base class of bayesdid's warnings (filter them together or one by one)."""


class FewAdoptersWarning(BayesDidWarning):
    """Only one or two jurisdictions adopt: cluster-robust least squares is unreliable."""


class DiagnosticsWarning(BayesDidWarning):
    """The sampler's diagnostics miss the thresholds; the posterior may not be trustworthy."""


class RowLevelFallbackWarning(BayesDidWarning):
    """The likelihood cannot be collapsed exactly and is evaluated on rows."""


class SparseJurisdictionWarning(BayesDidWarning):
    """A comparison jurisdiction is observed in too few periods to contribute to the comparison of changes."""


class PersistenceFallbackWarning(BayesDidWarning):
    """The study asks for persistent (AR(1)) gap noise but the data cannot learn it: the
    independent form is fitted instead, for the reason the message names."""


class CacheWarning(BayesDidWarning):
    """The compile cache cannot be used (a folder that cannot be written, a damaged entry): runs are slower."""
