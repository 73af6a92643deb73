"""A one-way house: imports only point down the layers, function-level imports included.

Layers, bottom first: the foundation (errors, contracts, the study file, the version), the data
(reading tables, covariate formulas, simulators), the cells (the exact collapse, the fixed structure,
the least-squares cross-check on cells), the model (shared terms, one module per family, the family
registry), inference (the sampler), estimands (effects, power-scaling), the fit pipeline (run), the
checks, batches (sweeps, calibration), the report, and the interface (the command line, benchmarks,
the notebook API and the package's own facade, bayesdid/__init__.py). A module may import its own
layer and those below, never one above; within a layer the graph must have no cycle. Importing
``a.b.c`` also counts as importing the package ``a.b`` (Python runs its ``__init__`` first), except the
root facade. ``model.structure`` (numpy rules read off the cells) sits on the cells floor: the
collapse reads it; ``model.family`` (the family records, no imports) sits on the foundation: the study
file and the data checks read it. Every module of the package must be placed here, so a new module has to be
given its floor.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent / "bayesdid"

LAYERS = [
    (
        "foundation",
        [
            "bayesdid.version",
            "bayesdid.errors",
            "bayesdid.contracts",
            "bayesdid.progress",
            "bayesdid.outputs",
            "bayesdid.frames",
            "bayesdid.cachedir",
            "bayesdid.modelcache",
            "bayesdid.study",
            "bayesdid.model",
            "bayesdid.model.family",
            "bayesdid.lifeline",
        ],
    ),  # the model package's __init__ imports nothing; model.family (the family records) imports nothing
    (
        "data",
        [
            "bayesdid.data",
            "bayesdid.covariates",
            "bayesdid.panels",
            "bayesdid.summaries",
            "bayesdid.simulate",
            "bayesdid.simulate_families",
        ],
    ),
    (
        "cells",
        [
            "bayesdid.fixed_effects",
            "bayesdid.model.structure",
            "bayesdid.cells",
            "bayesdid.stream",
            "bayesdid.crosscheck",
        ],
    ),
    (
        "model",
        [
            "bayesdid.model.registry",
            "bayesdid.model.terms",
            "bayesdid.model.gaussian",
            "bayesdid.model.families",
            "bayesdid.model.binomial",
            "bayesdid.model.counts",
            "bayesdid.model.twins",
        ],
    ),
    ("inference", ["bayesdid.sample", "bayesdid.on_dask"]),
    ("estimands", ["bayesdid.effects", "bayesdid.sensitivity", "bayesdid.trends"]),
    ("pipeline", ["bayesdid.run"]),
    (
        "checks",
        [
            "bayesdid.checks",
            "bayesdid.checks.base",
            "bayesdid.checks.event_time",
            "bayesdid.checks.pretrend",
            "bayesdid.checks.placebo",
            "bayesdid.checks.comparison",
            "bayesdid.checks.runner",
            "bayesdid.trends_rerun",
        ],
    ),
    (
        "batches",
        [
            "bayesdid.sweep",
            "bayesdid.sweep.spec",
            "bayesdid.sweep.worker",
            "bayesdid.sweep.executors",
            "bayesdid.sweep.tables",
            "bayesdid.sweep.resume",
            "bayesdid.sweep.runner",
            "bayesdid.calibration",
            "bayesdid.calibration.scenarios",
            "bayesdid.calibration.tasks",
            "bayesdid.calibration.coverage",
            "bayesdid.calibration.sbc",
            "bayesdid.calibration.summary",
            "bayesdid.calibration.runner",
        ],
    ),
    (
        "report",
        [
            "bayesdid.report",
            "bayesdid.report.reader",
            "bayesdid.report.words",
            "bayesdid.report.pieces",
            "bayesdid.report.sections",
            "bayesdid.report.sections.effect",
            "bayesdid.report.sections.checks",
            "bayesdid.report.sections.sensitivity",
            "bayesdid.report.sections.crosscheck",
            "bayesdid.report.sections.data",
            "bayesdid.report.sections.fit",
            "bayesdid.report.plots",
            "bayesdid.report.html",
            "bayesdid.report.plan_page",
            "bayesdid.plan",
        ],
    ),
    (
        "interface",
        [
            "bayesdid",
            "bayesdid.notebook",
            "bayesdid.cli",
            "bayesdid.bench",
            "bayesdid.bench.calibration",
            "bayesdid.bench.collapse",
            "bayesdid.bench.crosscheck",
            "bayesdid.bench.families",
            "bayesdid.bench.large_child",
            "bayesdid.bench.panel",
            "bayesdid.bench.placebo",
            "bayesdid.bench.sweep",
            "bayesdid.bench.weights",
            "bayesdid.bench.compile",
            "bayesdid.bench.persistence",
            "bayesdid.bench.plan",
            "bayesdid.bench.analyze",
        ],
    ),
]
FLOOR = {m: i for i, (_, mods) in enumerate(LAYERS) for m in mods}


def modules() -> dict[str, Path]:
    out = {}
    for p in ROOT.rglob("*.py"):
        parts = list(p.relative_to(ROOT.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


def imports(name: str, path: Path, known: set[str]) -> set[str]:
    """Package modules imported anywhere in the module (top level, functions, TYPE_CHECKING blocks)."""
    out = set()
    is_pkg = path.name == "__init__.py"
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        cands = []
        if isinstance(node, ast.Import):
            cands = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".") if is_pkg else name.split(".")[:-1]
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            subs = [f"{mod}.{a.name}" for a in node.names if f"{mod}.{a.name}" in known]
            cands = subs or [mod]  # `from . import plots` depends on the module, not on the package
        for c in cands:
            while c and c not in known:
                c = c.rpartition(".")[0]
            if c and c != name:
                out.add(c)
                # Python runs every parent package's __init__ first; the root facade excepted (it is
                # loaded before any module of the package, whatever imports what)
                parent = c.rpartition(".")[0]
                while parent and parent != "bayesdid" and not name.startswith(parent + ".") and parent != name:
                    out.add(parent)
                    parent = parent.rpartition(".")[0]
    return out


def graph() -> dict[str, set[str]]:
    mods = modules()
    known = set(mods)
    return {m: imports(m, p, known) for m, p in mods.items()}


def test_every_module_has_a_floor():
    missing = sorted(set(modules()) - set(FLOOR))
    assert not missing, f"give these modules a layer in tests/test_house.py: {missing}"


def upward(g) -> list[str]:
    bad = []
    for m, deps in g.items():
        for d in deps:
            if m in FLOOR and d in FLOOR and FLOOR[d] > FLOOR[m]:
                bad.append(f"{m} ({LAYERS[FLOOR[m]][0]}) imports {d} ({LAYERS[FLOOR[d]][0]})")
    return sorted(bad)


def cycles(g) -> list[list[str]]:
    index, low, stack, on, out = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in g.get(v, ()):
            if w not in g:
                continue
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in g:
        if v not in index:
            visit(v)
    return out


def test_no_upward_import():
    assert upward(graph()) == []


def test_no_import_cycle():
    assert cycles(graph()) == []


def test_the_checks_can_fail():
    g = {"bayesdid.study": {"bayesdid.cli"}, "bayesdid.cli": {"bayesdid.study"}}
    assert upward(g) == ["bayesdid.study (foundation) imports bayesdid.cli (interface)"]
    assert cycles(g) == [["bayesdid.cli", "bayesdid.study"]]


# --- no branch on a family's name outside model/ ------------------------------------------------------
#
# The rule: in every module of the package outside bayesdid/model/, a string literal that is a family
# name (one of model.family.FAMILIES) must not be
#   * an operand of a comparison (==, !=, in, not in, is), directly or as an element of a tuple, list
#     or set that is an operand (`fam == "binomial"`, `fam in ("poisson", "negbinomial")`);
#   * a key of a dict literal (`{"binomial": ...}`), a dict comprehension key, or a subscript
#     (`TABLE["poisson"]`);
#   * a `match` case value.
# Allowed: a family name as a value (a default argument `family="gaussian"`, the study file's default,
# a bench case naming the family it runs) and inside messages. No module is exempt: the study file
# checks the key against `FAMILIES` (a name, not a literal) and asks the record for everything else.
# What a module needs of a family it asks the family's record (model.family.Family).

MODEL_DIR = ROOT / "model"


def family_branches(source: str, names) -> list[tuple[int, str]]:
    """(line, what) of every family-name literal used as a comparison operand, dict key, subscript or case."""
    names = set(names)
    tree = ast.parse(source)
    out = []

    def lit(node):
        return isinstance(node, ast.Constant) and isinstance(node.value, str) and node.value in names

    def lits(node):
        if lit(node):
            return [node]
        if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
            return [e for e in node.elts if lit(e)]
        return []

    for node in ast.walk(tree):
        found = []
        if isinstance(node, ast.Compare):
            for operand in [node.left, *node.comparators]:
                found += [(n, "compared") for n in lits(operand)]
        elif isinstance(node, ast.Dict):
            found += [(k, "dict key") for k in node.keys if k is not None and lit(k)]
        elif isinstance(node, ast.DictComp):
            found += [(n, "dict key") for n in lits(node.key)]
        elif isinstance(node, ast.Subscript):
            found += [(n, "subscript") for n in lits(node.slice)]
        elif isinstance(node, ast.MatchValue):
            found += [(n, "match case") for n in lits(node.value)]
        out += [(n.lineno, f"{what} {n.value!r}") for n, what in found]
    return sorted(out)


def test_no_module_outside_model_branches_on_a_family_name():
    from bayesdid.model.family import FAMILIES

    bad = []
    for path in sorted(modules().values()):
        if path.is_relative_to(MODEL_DIR):
            continue
        for line, what in family_branches(path.read_text(encoding="utf-8"), FAMILIES):
            bad.append(f"{path.relative_to(ROOT.parent)}:{line}: {what}")
    assert not bad, "ask the family record (bayesdid/model/family.py) instead of the name:\n" + "\n".join(bad)


def test_the_family_branch_rule_can_fail():
    src = (
        'def f(fam, family="gaussian"):\n'
        '    if fam == "binomial":\n'
        "        pass\n"
        '    if fam in ("poisson", "negbinomial"):\n'
        "        pass\n"
        '    t = {"poisson": 1}\n'
        '    u = T["gaussian"]\n'
        "    match fam:\n"
        '        case "binomial":\n'
        "            pass\n"
        '    return f"family {fam!r} is not \'gaussian\'", "gaussian"\n'
    )
    got = family_branches(src, ("gaussian", "binomial", "poisson", "negbinomial"))
    assert got == [
        (2, "compared 'binomial'"),
        (4, "compared 'negbinomial'"),
        (4, "compared 'poisson'"),
        (6, "dict key 'poisson'"),
        (7, "subscript 'gaussian'"),
        (9, "match case 'binomial'"),
    ]
