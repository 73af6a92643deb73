"""Checks the analyst needs before believing an estimate.

* :mod:`.event_time`: effects by event time (reference k = -1), leads as the pre-trend test;
* :mod:`.pretrend`: posterior predictive check of the adopters' pre-policy gap path;
* :mod:`.placebo`: a fake start in time, and comparison jurisdictions as fake adopters in space;
* :mod:`.comparison`: each comparison jurisdiction's own change of gap, outliers, leave-one-out;
* :mod:`.runner`: run them for a study and write ``checks.json`` and CSV plot tables.

Every check returns a :class:`~.base.CheckResult` with a status ("ok", "flag", "not applicable"),
the threshold used, the offenders and a plain reason.
"""

from .base import CheckResult
from .comparison import comparison_check
from .event_time import event_time_check, fit_event_time
from .placebo import placebo_space_check, placebo_time_check
from .pretrend import pretrend_check
from .runner import CHECKS, CheckReport, run_checks, write_checks

__all__ = [
    "CheckResult",
    "CHECKS",
    "CheckReport",
    "run_checks",
    "write_checks",
    "event_time_check",
    "fit_event_time",
    "pretrend_check",
    "placebo_time_check",
    "placebo_space_check",
    "comparison_check",
]
