"""bayesdid: Bayesian triple difference (DDD) and difference in differences (DiD) for policies
adopted by one or a few jurisdictions, with partial pooling across many comparison jurisdictions.

Typical use::

    from bayesdid import load_study, analyse, write_run
    an = analyse(load_study("study.toml"))
    print(an.effects.effect)
    write_run(an, "runs/first")
"""

from .lifeline import arm_from_env as _arm_from_env  # noqa: E402
from .version import __version__  # noqa: E402

_arm_from_env()  # a sweep's worker binds itself to the sweep before its heavy imports (bayesdid.lifeline)

# The compile cache folder must be chosen before PyTensor or numba is imported (they read their
# folders at import); the command line may choose another one with --cache-dir before its first
# heavy import, which is why the names of .run are imported lazily below.
from . import cachedir as _cachedir  # noqa: E402

_cachedir.configure()

from .cells import Cells, collapse  # noqa: E402
from .errors import BayesDidError, DataRoleError, DiagnosticsWarning, FewAdoptersWarning, StudyError  # noqa: E402
from .study import Study, load_study, make_study  # noqa: E402


def __getattr__(name):
    if name in ("Analysis", "analyse", "write_run"):
        from . import run

        return getattr(run, name)
    raise AttributeError(f"module 'bayesdid' has no attribute {name!r}")


__all__ = [
    "__version__",
    "BayesDidError",
    "DataRoleError",
    "DiagnosticsWarning",
    "FewAdoptersWarning",
    "StudyError",
    "Study",
    "load_study",
    "make_study",
    "Cells",
    "collapse",
    "Analysis",
    "analyse",
    "write_run",
]
