"""The ``bayesdid`` command line. Thin: it parses, calls the library and prints.

Exit codes: 0 success (a warning when diagnostics fail), 2 bad input (one paragraph naming what is
wrong and how to fix it; nothing written), 3 diagnostics failed under ``--strict``.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import textwrap
import warnings
from pathlib import Path

from .errors import BayesDidError, BayesDidWarning

__all__ = ["main"]

EXIT_OK, EXIT_BAD_INPUT, EXIT_DIAGNOSTICS, EXIT_VARIANTS_FAILED = 0, 2, 3, 4


def _say(msg: str) -> None:
    print(f"bayesdid: {msg}", file=sys.stderr, flush=True)


def _overrides(study, args):
    """The study with the command line's sampler options; each goes through the study's own checks."""
    from .errors import StudyError

    for key in ("chains", "draws", "tune", "seed"):
        v = getattr(args, key, None)
        if v is not None:
            try:
                study = study.replace(sampler={key: v})
            except StudyError as exc:
                raise StudyError(f"command-line option --{key} {v}: {exc}") from None
    return study


def _add_sampling(p):
    p.add_argument("--draws", type=int, help="draws per chain (overrides the study file)")
    p.add_argument("--tune", type=int, help="tuning steps per chain (overrides the study file)")
    p.add_argument("--chains", type=int, help="number of chains (overrides the study file)")
    p.add_argument("--seed", type=int, help="random seed (overrides the study file)")
    p.add_argument("--strict", action="store_true", help="exit 3 when sampler diagnostics fail")
    p.add_argument("--replace", action="store_true", help="replace an existing, non-empty --out folder")
    p.add_argument("--quiet", action="store_true", help="no progress display")


def _add_streaming(p):
    p.add_argument(
        "--stream",
        action="store_true",
        help="collapse the table without reading it into memory (implied when data.table is a folder or a glob)",
    )
    p.add_argument("--cluster", help="collapse on Dask: a scheduler address (tcp://host:8786) or 'local'")


def _fit_and_write(study, out, args, argv, then=None):
    from .report.words import headline_of
    from .run import analyse, atomic_folder, prepare, write_run
    from .sample import warn_if_bad

    atomic_folder(out, replace=args.replace).check()  # before any work: the folder, then the table
    prepared = prepare(study, stream=getattr(args, "stream", False), cluster=getattr(args, "cluster", None))
    an = analyse(
        study,
        progress=not args.quiet,
        log=None if args.quiet else _say,
        full_cross_check=not getattr(args, "no_cross_check", False),
        prepared=prepared,
    )
    path = write_run(an, out, replace=args.replace, argv=argv)
    summary = json.loads((path / "summary.json").read_text())
    print(headline_of(summary, json.loads((path / "manifest.json").read_text()).get("study")))
    print(f"results in {path}")
    if then is not None:
        then(study, path, an)
    diag = an.fit.diagnostics
    if not diag["ok"]:
        _say("WARNING: " + diag["advice"])
        warn_if_bad(diag)
        if args.strict:
            return EXIT_DIAGNOSTICS
    return EXIT_OK


def cmd_fit(args, argv):
    from .study import load_study

    study = _overrides(load_study(args.study), args)
    return _fit_and_write(study, args.out, args, argv)


def case_dir(name: str) -> Path:
    root = Path(__file__).resolve().parent.parent / "case_files"
    return root / name


def cmd_demo(args, argv):
    from .study import load_study

    d = case_dir(args.case)
    gen = d.parent / "make_cases.py"
    if not (d / "study.toml").is_file() or not load_study(d / "study.toml").table.exists():
        if not gen.is_file():
            raise BayesDidError(f"demo case '{args.case}' not found under {d.parent}; known cases are in case_files/.")
        import importlib.util

        spec = importlib.util.spec_from_file_location("bayesdid_cases", gen)
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        if args.case not in mod.CASES:
            raise BayesDidError(f"unknown demo case '{args.case}'; choose one of {sorted(mod.CASES)}.")
        mod.make(args.case)
    study = _overrides(load_study(d / "study.toml"), args)
    _say(f"demo case '{args.case}': {study.title} (invented data)")
    log = None if args.quiet else _say
    return _fit_and_write(
        study, args.out, args, argv, then=lambda st, path, an: _demo_steps(st, path, log, d / "study.toml", an)
    )


#: The demo's short sweep: the base study and one variant with the effect prior at a tenth of the
#: scale the fit used (does the answer lean on the prior?); for a Gaussian study also
#: :data:`DRIFT_VARIANT` (does it lean on parallel gap trends?).
DEMO_SWEEP = """study = {study}
title = "demo: does the answer lean on the effect prior?"

[sampler]
chains = {chains}
draws = {draws}
tune = {tune}
seed = {seed}

[[variant]]
label = "effect prior a tenth as wide"
priors = {{ effect = {effect} }}
"""

#: The pooled gap drifts of ``model.gap_drift`` as a sweep variant: each jurisdiction's gap may drift
#: linearly (adopters' drifts learned from their own pre-policy periods). It is run by the demo's sweep
#: rather than by every ``analyze``: it is a second model structure (one more compile, about as long
#: as the main fit's), which the demo pays once to show it while ``analyze`` keeps one compile;
#: a study's own sweep file adds the same two lines (README, "Persistent shocks").
DRIFT_VARIANT = """
[[variant]]
label = "pooled gap drifts (model.gap_drift)"
model = { gap_drift = true }
"""


def _demo_steps(study, path, log, study_file, an=None):
    """After the demo's fit: every check, a two-variant sweep (serial, reusing this process's compiled
    model) and the report, so the first report a newcomer opens is complete."""
    import tempfile

    from .checks.runner import checks_into_run
    from .model.family import family_record
    from .sweep import run_sweep

    say = log or (lambda m: None)
    say("demo: running every check (progress below)")
    reuse = {"cells": an.cells, "main_fit": an.fit} if an is not None else {}
    checks_into_run(study, path, log=log, **reuse)
    summary = json.loads((Path(path) / "summary.json").read_text())
    effect = 0.1 * float(summary["priors"]["effect"]["scale"])
    sp = study.sampler
    text = DEMO_SWEEP.format(
        study=json.dumps(str(Path(study_file).resolve())),
        chains=sp.chains,
        draws=sp.draws,
        tune=sp.tune,
        seed=sp.seed,
        effect=effect,
    )
    drift = family_record(study.model.family).allows("gap_drift") and not study.model.gap_drift
    if drift:
        text += DRIFT_VARIANT
    with tempfile.TemporaryDirectory() as tmp:
        f = Path(tmp) / "demo_sweep.toml"
        f.write_text(text, encoding="utf-8")
        say("demo: a short sweep (base, a tighter effect prior" + (", pooled gap drifts)" if drift else ")"))
        run_sweep(f, Path(path) / "sweep", executor="serial", log=log)
    _write_report_step(study, path)


# --- report and analyze ------------------------------------------------------------------------

#: Steps `bayesdid analyze` runs after the fit when their modules exist: (name, module, function).
#: Each function is called as fn(study, run_dir) and writes its results inside run_dir (the checks
#: into run_dir/checks); the report reads them from there. The fit itself already carries the
#: cross-check and the power-scaling sensitivity; a sweep over variants is `bayesdid sweep`.
ANALYZE_STEPS = [
    ("checks", "bayesdid.checks.runner", "checks_into_run"),
]


def _write_report_step(study, path, an=None):
    from .report.html import write_report

    print(f"report in {write_report(path)}")


def _optional_steps(study, path, an=None):
    """The steps of ANALYZE_STEPS; a step that takes ``cells`` and ``main_fit`` reuses the fit just made
    (same cells, priors, settings and seed: the same draws it would sample again)."""
    import importlib
    import inspect

    for name, mod, fn in ANALYZE_STEPS:
        try:
            func = getattr(importlib.import_module(mod), fn)
        except (ImportError, AttributeError):
            _say(f"{name}: not available in this version of bayesdid; the report marks it as absent")
            continue
        params = inspect.signature(func).parameters
        reuse = (
            {"cells": an.cells, "main_fit": an.fit}
            if an is not None and "cells" in params and "main_fit" in params
            else {}
        )
        try:
            func(study, path, **reuse)
            _say(f"{name}: done")
        except BayesDidError as exc:
            _say(f"{name}: not run ({exc}); the report marks it as absent")
        except Exception as exc:  # noqa: BLE001 - a failing optional step must not cost the user the report
            _say(f"{name}: not run, it failed with {type(exc).__name__}: {exc}; the report marks it as absent")
    _write_report_step(study, path)


def cmd_analyze(args, argv):
    from .study import load_study

    study = _overrides(load_study(args.study), args)
    return _fit_and_write(study, args.out, args, argv, then=_optional_steps)


def cmd_report(args, argv):
    from .report.html import write_report

    print(f"report in {write_report(args.run_dir)}")
    return EXIT_OK


def cmd_bench(args, argv):
    from . import bench

    result = bench.run(args.name, quick=args.quick, **_calibration_kwargs(args))
    print(json.dumps(result))
    return EXIT_OK


def cmd_checks(args, argv):
    from .checks import CHECKS as CHECK_NAMES
    from .checks import run_checks, write_checks
    from .run import atomic_folder, prepare
    from .study import load_study

    study = _overrides(load_study(args.study), args)
    atomic_folder(args.out, replace=args.replace, kind="checks").check()
    if args.only is not None and args.only not in CHECK_NAMES:
        raise BayesDidError(f"unknown check '{args.only}' for --only; choose one of {list(CHECK_NAMES)}.")
    tol = args.lead_tolerance
    if tol is not None and not (math.isfinite(tol) and tol > 0):
        raise BayesDidError(
            f"command-line option --lead-tolerance {tol}: expected a positive finite number (on "
            "the model scale: log units for a log outcome)."
        )
    cells, digest, _ = prepare(study)
    report = run_checks(
        study,
        cells=cells,
        only=args.only,
        tolerance=args.lead_tolerance,
        pooled=args.pool_event_times,
        log=None if args.quiet else _say,
        data_sha256=digest,
    )
    path = write_checks(report, args.out, replace=args.replace, argv=argv)
    for r in report.results.values():
        print(r)
    print(f"checks in {path}")
    bad = [n for n, r in report.results.items() if r.details.get("diagnostics_ok") is False]
    if bad:
        _say("WARNING: sampler diagnostics fail in the fits of: " + ", ".join(bad) + "; run more draws (--draws).")
        if args.strict:
            return EXIT_DIAGNOSTICS
    return EXIT_OK


def cmd_trends(args, argv):
    """Parallel-trends sensitivity of a run folder: rewrite its trends.csv and summary.json's section."""

    from .outputs import atomic_write
    from .run import json_text
    from .trends import write_trends
    from .trends_rerun import trends_from_run

    mult = None
    if args.multiples is not None:
        try:
            mult = [float(v) for v in args.multiples.split(",") if v.strip()]
        except ValueError:
            raise BayesDidError(
                f"command-line option --multiples {args.multiples!r}: expected numbers separated by "
                "commas, e.g. 0,0.5,1,2."
            ) from None
        if not mult or any(not math.isfinite(v) or v < 0 for v in mult):
            raise BayesDidError(
                f"command-line option --multiples {args.multiples!r} (trends.multiples): expected "
                "zero or positive finite numbers; M scales the largest pre-policy change."
            )
        mult = sorted(mult)
    run = Path(args.run_dir)
    tb = trends_from_run(run, multiples=mult)
    summary_path = run / "summary.json"
    summary = json.loads(summary_path.read_text(encoding="utf-8"))
    summary["parallel_trends"] = tb.to_dict()
    if tb.rows:
        write_trends(tb, run)
    atomic_write(summary_path, json_text(summary))
    if tb.status != "ok":
        print(f"parallel-trends sensitivity: {tb.status} ({tb.reason})")
        return EXIT_OK
    ratio = tb.scale.startswith("link")  # binomial and count families: the link-scale ends read as ratios
    what = ("odds ratio" if "odds" in tb.scale else "rate ratio") if ratio else "model scale"
    print(f"M      95% interval of the effect ({what}){' ' * max(1, 15 - len(what))}P(reduction)  P(increase)")
    for r in tb.rows:
        lo, hi = (math.exp(r["lower_95"]), math.exp(r["upper_95"])) if ratio else (r["lower_95"], r["upper_95"])
        print(
            f"{r['M']:<6g} {lo:>10.4g} to {hi:<10.4g}                 "
            f"{r['prob_reduction']:>8.1%}  {r['prob_increase']:>10.1%}"
        )
    print(tb.sentence)
    print(f"written to {run / 'trends.csv'} and summary.json (parallel_trends)")
    return EXIT_OK


def cmd_sweep(args, argv):
    from .sweep import check_sweep_folder, load_sweep, run_sweep

    if args.cluster and args.serial:
        raise BayesDidError(
            "--serial and --cluster exclude each other: --serial runs every variant in this "
            "process, --cluster sends them to Dask. Give one of them."
        )
    check_sweep_folder(args.out)  # before reading the sweep's table
    executor = "serial" if args.serial else ("dask" if args.cluster else "pool")
    plan = load_sweep(args.sweep)
    rep = run_sweep(
        plan,
        args.out,
        executor=executor,
        workers=args.workers,
        cluster=args.cluster,
        progress=not args.quiet,
        log=None if args.quiet else _say,
    )
    v = rep["verdict"]
    done = sum(r["status"] == "done" for r in rep["rows"])
    print(
        f"{done} of {len(rep['rows'])} variant(s) done ({len(rep['ran'])} run now, {len(rep['skipped'])} "
        f"already done, {len(rep['failed'])} failed); results in {args.out}"
    )
    if v.get("status") == "ok":
        held = "; ".join(
            f"{c['check']}: {'holds' if c['holds'] else 'breaks in ' + str(len(c['breaks']))}"
            for c in v["checks"]
            if c["holds"] is not None
        )
        print(
            f"verdict: {held}"
            + (
                f"; moves most: {v['moves_most']['label']} ({v['moves_most']['shift_sd']:.2f} base sd)"
                if v.get("moves_most")
                else ""
            )
        )
    if rep["failed"]:
        _say(
            f"{len(rep['failed'])} variant(s) failed; their errors are in {args.out}/manifest.json. "
            "Rerun the same command to retry them (finished variants are kept)."
        )
        return EXIT_VARIANTS_FAILED
    return EXIT_OK


def cmd_plan(args, argv):
    from .plan import load_plan, progress_path, run_plan, with_overrides, write_plan
    from .report.plan_page import plan_sentences
    from .run import atomic_folder

    plan = with_overrides(load_plan(args.plan), reps=args.reps, draws=args.draws, tune=args.tune, seed=args.seed)
    atomic_folder(args.out, replace=args.replace, kind="plan").check()  # before any work
    progress = progress_path(args.out)
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    result = run_plan(
        plan,
        workers=args.workers,
        cluster=args.cluster,
        progress_file=progress,
        progress=not args.quiet,
        log=None if args.quiet else _say,
    )
    path = write_plan(result, args.out, replace=args.replace, argv=argv)
    for line in plan_sentences(result["summary"]):
        print(line)
    print(f"plan results in {path}")
    failed = result["summary"]["failed"]
    if failed:
        _say(
            f"{len(failed)} rep(s) failed (errors in {path}/plan.json); the tables use the others. The finished "
            f"reps are kept in {progress}: rerun the same command with --replace to retry the failed ones."
        )
        return EXIT_VARIANTS_FAILED
    progress.unlink(missing_ok=True)
    return EXIT_OK


# ---- bench calibration options (issue 8) ----
_CALIBRATION_OPTIONS = (
    "reps",
    "scenario",
    "out",
    "workers",
    "cluster",
    "sbc_reps",
    "draws",
    "tune",
    "seed",
    "replace",
    "large",
    "rows",
)


def _add_calibration_options(b):
    c = b.add_argument_group("calibration (bayesdid bench calibration)")
    c.add_argument("--reps", type=int, help="simulated data sets for coverage (default 200; 4 with --quick)")
    c.add_argument(
        "--scenario",
        help="one_adopter (default), staggered, did, heavy_tails, ar1_ddd_0, ar1_ddd_05, "
        "ar1_ddd_08, ar1_did_08, ar1_staggered_08, one_row_did, castle_placebo; "
        "bench persistence: copay_cap (default) or nurse_line",
    )
    c.add_argument(
        "--out",
        help="folder for calibration.json, the per-rep CSVs and the SBC plot (default runs/calibration-SCENARIO)",
    )
    c.add_argument("--workers", type=int, help="local worker processes (default 2; 1 runs in this process)")
    c.add_argument(
        "--cluster",
        help="run the reps on Dask: a scheduler address (tcp://host:8786) or 'local' "
        "for a local Dask cluster of --workers processes",
    )
    c.add_argument("--sbc-reps", type=int, help="simulation-based calibration reps (default: as --reps; 0 skips)")
    c.add_argument("--draws", type=int, help="draws per chain (default 500)")
    c.add_argument("--tune", type=int, help="tuning steps per chain (default 500)")
    c.add_argument("--seed", type=int, help="base seed; each rep's seeds derive from it and the rep index")
    c.add_argument("--replace", action="store_true", help="replace an existing, non-empty --out folder")
    k = b.add_argument_group("large tables (bayesdid bench collapse --large)")
    k.add_argument(
        "--large",
        action="store_true",
        help="write a Parquet data set in parts and stream-collapse it (time, peak memory, Dask equality)",
    )
    k.add_argument(
        "--rows", type=int, help="rows of the --large data set (default 200,000,000; 2,000,000 with --quick)"
    )


#: Options each benchmark takes beyond --quick (the calibration benchmark takes them all).
_BENCH_OPTIONS = {
    "calibration": set(_CALIBRATION_OPTIONS) - {"large", "rows"},
    "collapse": {"large", "rows"},
    "weights": {"reps", "draws", "tune", "seed"},
    "persistence": {"scenario"},
    "panel": {"reps", "draws", "tune", "seed"},
    "plan": {"reps", "workers", "cluster"},
}


def _calibration_kwargs(args) -> dict:
    given = {k: getattr(args, k, None) for k in _CALIBRATION_OPTIONS}
    given = {k: v for k, v in given.items() if v is not None and v is not False}
    allowed = _BENCH_OPTIONS.get(args.name, set())
    extra = [k for k in given if k not in allowed]
    if extra:
        opts = ", ".join("--" + k.replace("_", "-") for k in extra)
        takers = sorted(n for n, o in _BENCH_OPTIONS.items() if set(extra) <= o)
        raise BayesDidError(
            f"{opts}: 'bayesdid bench {args.name}' does not take "
            f"{'this option' if len(extra) == 1 else 'these options'}"
            + (f"; {', '.join(takers)} do{'es' if len(takers) == 1 else ''}." if takers else ".")
        )
    return given


def cmd_cache(args, argv):
    from . import cachedir

    c = cachedir.current()
    if args.action == "clear":
        before = cachedir.clear(c)
        print(
            f"removed {before['models']} compiled model(s) and {before['bytes'] / 1e6:.1f} MB of compile files "
            f"from {c.path}"
        )
        return EXIT_OK
    from .modelcache import entry_ok

    i = cachedir.info(c, entry_ok=entry_ok)
    print(f"cache folder: {i['folder']} (chosen by {i['chosen_by']})")
    print(f"writable: {'yes' if i['writable'] else 'no, ' + i['reason']}")
    print(
        f"compiled models: {i['models']}"
        + (f" ({i['damaged']} damaged: the next run that needs them rebuilds them)" if i["damaged"] else "")
    )
    for sub, p in i["parts"].items():
        print(f"  {sub}/: {p['files']} file(s), {p['bytes'] / 1e6:.1f} MB")
    print("clear it with: bayesdid cache clear")
    return EXIT_OK


def _add_cache_dir(p, top: bool = False):
    p.add_argument(
        "--cache-dir",
        metavar="FOLDER",
        default=None if top else argparse.SUPPRESS,
        help="compile cache folder (default: $BAYESDID_CACHE_DIR, else $XDG_CACHE_HOME/bayesdid, "
        "else ~/.cache/bayesdid)",
    )


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="bayesdid",
        description="Bayesian DDD / DiD for a policy adopted by a few jurisdictions.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=textwrap.dedent("""\
            exit codes: 0 done, 2 bad input (nothing written), 3 diagnostics failed with --strict,
            4 some sweep variants or plan reps failed (recorded; rerun to retry)"""),
    )
    _add_cache_dir(p, top=True)
    sub = p.add_subparsers(dest="command", required=True)
    f = sub.add_parser("fit", help="fit a study and write a run folder")
    f.add_argument("study", help="study file (TOML)")
    f.add_argument("--out", required=True, help="run folder to create")
    _add_sampling(f)
    _add_streaming(f)
    f.add_argument(
        "--no-cross-check",
        action="store_true",
        help="least squares: keep the estimate and its classical, HC1 and CR1 errors, skip the "
        "wild cluster bootstrap and the placebo permutation",
    )
    f.set_defaults(func=cmd_fit)
    d = sub.add_parser("demo", help="generate (if needed) and fit an invented demo case, then write its report")
    d.add_argument("--out", default="runs/demo", help="run folder to create (default runs/demo)")
    d.add_argument("--case", default="copay_cap", help="demo case under case_files/ (default copay_cap)")
    _add_sampling(d)
    d.set_defaults(func=cmd_demo)
    a = sub.add_parser("analyze", help="fit, run the checks and sensitivity steps available, and write the report")
    a.add_argument("study", help="study file (TOML)")
    a.add_argument("--out", required=True, help="run folder to create")
    _add_sampling(a)
    _add_streaming(a)
    a.set_defaults(func=cmd_analyze)
    r = sub.add_parser("report", help="write RUN_DIR/report.html, a single-file HTML report of a run folder")
    r.add_argument("run_dir", metavar="RUN_DIR", help="run folder written by fit, analyze or demo")
    r.set_defaults(func=cmd_report)
    c = sub.add_parser("checks", help="event time, pre-trend and placebo checks; writes checks.json and CSV tables")
    c.add_argument("study", help="study file (TOML)")
    c.add_argument("--out", required=True, help="checks folder to create")
    c.add_argument("--only", help="run one check: event_time, pretrend, placebo_time, comparison, placebo_space")
    c.add_argument("--lead-tolerance", type=float, help="leads within +-this (model scale) count as no pre-trend")
    c.add_argument("--pool-event-times", action="store_true", help="partially pool event-time effects to zero")
    _add_sampling(c)
    c.set_defaults(func=cmd_checks)
    w = sub.add_parser("sweep", help="run a batch of variants of a study (priors, comparison sets, options)")
    w.add_argument("sweep", help="sweep file (TOML) naming the base study and its variants")
    w.add_argument("--out", required=True, help="results folder (reused on a rerun: finished variants are kept)")
    w.add_argument("--workers", type=int, default=2, help="worker processes (local pool or local Dask; default 2)")
    w.add_argument(
        "--cluster",
        help="run on Dask: a scheduler address (tcp://host:8786) or 'local' for a LocalCluster on 127.0.0.1",
    )
    w.add_argument("--serial", action="store_true", help="run the variants one after another in this process")
    w.add_argument("--quiet", action="store_true", help="no progress display")
    w.set_defaults(func=cmd_sweep)
    t = sub.add_parser(
        "trends",
        help="how far parallel trends may fail before the conclusion changes "
        "(relative-magnitudes bound over a grid of M) for a run folder",
    )
    t.add_argument("run_dir", metavar="RUN_DIR", help="run folder written by fit, analyze or demo")
    t.add_argument("--multiples", help="grid of M, comma-separated (default: the study's trends.multiples)")
    t.set_defaults(func=cmd_trends)
    pl = sub.add_parser("plan", help="assurance before the data: simulate and fit a proposed evaluation's layout")
    pl.add_argument("plan", help="plan file (TOML): layout, noise, true effects, decision rule")
    pl.add_argument("--out", required=True, help="folder for plan.json, the CSV tables, the figure and report.html")
    pl.add_argument(
        "--workers",
        type=int,
        default=2,
        help="worker processes (local pool or local Dask; default 2; 1 runs in this process)",
    )
    pl.add_argument("--cluster", help="run the reps on Dask: a scheduler address (tcp://host:8786) or 'local'")
    pl.add_argument("--reps", type=int, help="data sets per layout and effect (overrides simulation.reps)")
    pl.add_argument("--draws", type=int, help="draws per chain (overrides simulation.draws)")
    pl.add_argument("--tune", type=int, help="tuning steps per chain (overrides simulation.tune)")
    pl.add_argument("--seed", type=int, help="base seed (overrides simulation.seed)")
    pl.add_argument("--replace", action="store_true", help="replace an existing, non-empty --out folder")
    pl.add_argument("--quiet", action="store_true", help="no progress display")
    pl.set_defaults(func=cmd_plan)
    b = sub.add_parser("bench", help="benchmarks that print one JSON line of measured ratios")
    b.add_argument(
        "name",
        help="benchmark name: collapse, crosscheck, families, placebo, sweep, calibration, "
        "weights, panel, plan, compile, analyze",
    )
    b.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    _add_calibration_options(b)
    b.set_defaults(func=cmd_bench)
    k = sub.add_parser("cache", help="show or clear the compile cache (compiled models kept between runs)")
    k.add_argument("action", choices=("info", "clear"), help="info: where it is and what it holds; clear: empty it")
    k.set_defaults(func=cmd_cache)
    for sp in (f, d, a, c, w, pl, b, k):
        _add_cache_dir(sp)
    return p


def _paragraph(text: str) -> str:
    """One paragraph wrapped at 100 columns; paths and values are never split."""
    return textwrap.fill(text, width=100, subsequent_indent="  ", break_on_hyphens=False, break_long_words=False)


def _show_warning(message, category, filename, lineno, file=None, line=None, _default=warnings.showwarning):
    """bayesdid's own warnings as one plain paragraph; others as Python shows them."""
    if issubclass(category, BayesDidWarning):
        print("bayesdid: warning: " + _paragraph(str(message)), file=sys.stderr, flush=True)
    else:
        _default(message, category, filename, lineno, file, line)


def _use_cache_dir(folder: str) -> None:
    """Point the compile cache at ``folder`` before PyTensor and numba are imported."""
    from . import cachedir

    if "pytensor" in sys.modules and cachedir.current().path != cachedir.resolve(folder)[0]:
        _say(
            f"--cache-dir {folder}: PyTensor is already loaded in this process, so only bayesdid's compiled "
            "models go there; PyTensor's own files stay in " + str(cachedir.current().path)
        )
    cachedir.configure(folder)


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.cache_dir is not None:
        _use_cache_dir(args.cache_dir)
    with warnings.catch_warnings():
        warnings.showwarning = _show_warning
        try:
            return args.func(args, ["bayesdid", *argv])
        except BayesDidError as exc:
            print("bayesdid: error: " + _paragraph(str(exc)), file=sys.stderr)
            return EXIT_BAD_INPUT


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
