"""The sweep file: its keys, the variants it names (axes, explicit variants, their combination), their ids and seeds."""

from __future__ import annotations

import copy
import hashlib
import itertools
import json
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import BayesDidError, SweepError
from ..model.registry import study_priors
from ..study import PRIOR_NAMES, Study, _parse, load_study, study_to_dict
from ..version import __version__

_TOP = {"study", "title", "combine", "sampler", "priors", "comparisons", "covariates", "outcomes", "options", "variant"}
_OPTION_KEYS = {"label", "family", "log_outcome", "missing", "threshold"}
_VARIANT_KEYS = {"label", "priors", "model", "policy", "outcome", "drop", "threshold"}


def _err(key: str, value: Any, expected: str, fix: str = "") -> SweepError:
    msg = f"sweep key '{key}': expected {expected}, found {value!r}."
    return SweepError(msg + (f" {fix}" if fix else ""))


# ---- variants ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class Variant:
    """One variant: its overrides of the base study, in study-file layout, and what they resolve to.

    ``overrides`` keys: ``priors`` {name: scale}, ``model`` {family, log_outcome, covariates,
    missing}, ``data`` {outcome}, ``policy`` {adopters, target_group}, ``decision`` {threshold},
    ``drop`` [comparison jurisdictions left out].
    """

    label: str
    overrides: dict
    id: str = ""
    seed: int = 0
    raw: dict = field(default_factory=dict, repr=False)  # the resolved study, study-file layout


def _merge(raw: dict, overrides: Mapping) -> dict:
    out = copy.deepcopy(raw)
    for sec, vals in overrides.items():
        if sec == "drop":
            continue
        if sec == "policy":  # an adopter map replaces the base one (placebo assignments)
            out.setdefault("policy", {}).update(copy.deepcopy(dict(vals)))
        else:
            out.setdefault(sec, {}).update(copy.deepcopy(dict(vals)))
        if sec == "model" and vals.get("covariates", "missing") in ("", None):
            out["model"].pop("covariates", None)
    return out


def _plain_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str)


def variant_id(raw: dict, drop: list, base_seed: int, data_sha: str) -> str:
    """sha256(resolved study without title and seed, dropped jurisdictions, base seed, data hash,
    bayesdid version)[:12]."""
    content = copy.deepcopy(raw)
    content.pop("title", None)
    content.get("sampler", {}).pop("seed", None)
    blob = _plain_json(
        {
            "study": content,
            "drop": sorted(drop),
            "base_seed": int(base_seed),
            "data_sha256": data_sha,
            "bayesdid": __version__,
        }
    )
    return hashlib.sha256(blob.encode()).hexdigest()[:12]


def derived_seed(base_seed: int, vid: str) -> int:
    """The variant's sampler seed: first 4 bytes of sha256("<base seed>/<id>"), below 2**31."""
    h = hashlib.sha256(f"{int(base_seed)}/{vid}".encode()).digest()
    return int.from_bytes(h[:4], "big") % (2**31)


def _label(overrides: Mapping) -> str:
    parts = []
    for sec in sorted(overrides):
        vals = overrides[sec]
        if sec == "drop":
            parts.append("drop=" + "+".join(vals))
        elif sec == "label":
            continue
        else:
            for k in sorted(vals):
                v = vals[k]
                parts.append(f"{sec}.{k}={_plain_json(v) if isinstance(v, (dict, list)) else v}")
    return ", ".join(parts) or "base"


@dataclass
class SweepPlan:
    """A validated sweep: the base study and its variants, in run order (base first)."""

    path: Path
    base: Study
    variants: list
    combine: str
    title: str
    sha256: str
    data_sha256: dict

    def describe(self) -> dict:
        return {
            "sweep_file": str(self.path),
            "sweep_sha256": self.sha256,
            "combine": self.combine,
            "title": self.title,
            "variants": len(self.variants),
        }


def _list_of(v, key, check, expected):
    if not isinstance(v, list) or not v:
        raise _err(key, v, f"a non-empty list of {expected}")
    for x in v:
        if not check(x):
            raise _err(key, v, f"a list of {expected}", f"The item {x!r} is not one.")
    return v


def _axes(raw: Mapping, comparisons: list[str], adopters: set[str]) -> list[list[dict]]:
    """Each axis: a list of override dicts (one per value)."""
    axes = []
    pri = raw.get("priors", {})
    if not isinstance(pri, Mapping):
        raise _err("priors", pri, "a table of prior name = [scales]")
    unknown = sorted(set(pri) - set(PRIOR_NAMES))
    if unknown:
        raise SweepError(f"unknown prior name(s) {unknown} in [priors]; allowed names are {sorted(PRIOR_NAMES)}.")
    if pri:
        names = sorted(pri)
        for n in names:
            _list_of(
                pri[n],
                f"priors.{n}",
                lambda x: isinstance(x, (int, float)) and not isinstance(x, bool) and x > 0 and np.isfinite(x),
                "positive numbers (prior scales on the model scale)",
            )
        axes.append(
            [
                {"priors": {n: float(v) for n, v in zip(names, combo)}}
                for combo in itertools.product(*(pri[n] for n in names))
            ]
        )
    comp = raw.get("comparisons", {})
    if not isinstance(comp, Mapping):
        raise _err("comparisons", comp, "a table with 'leave_each_out' and/or 'drop'")
    bad = sorted(set(comp) - {"leave_each_out", "drop"})
    if bad:
        raise SweepError(f"unknown key(s) {bad} in [comparisons]; allowed keys are ['drop', 'leave_each_out'].")
    drops = []
    loo = comp.get("leave_each_out", False)
    if not isinstance(loo, bool):
        raise _err("comparisons.leave_each_out", loo, "true or false")
    if loo:
        drops += [[c] for c in comparisons]
    if "drop" in comp:
        for i, sub in enumerate(
            _list_of(
                comp["drop"],
                "comparisons.drop",
                lambda x: isinstance(x, list) and x,
                "non-empty lists of comparison jurisdictions",
            )
        ):
            for c in sub:
                if c in adopters:
                    raise _err(
                        f"comparisons.drop[{i}]",
                        c,
                        "a comparison jurisdiction",
                        f"'{c}' adopts the policy; only comparison jurisdictions can be left out.",
                    )
                if c not in comparisons:
                    raise _err(
                        f"comparisons.drop[{i}]", c, f"a jurisdiction of the table (one of {comparisons[:6]}...)"
                    )
            drops.append(sorted(str(c) for c in sub))
    if drops:
        axes.append([{"drop": d} for d in drops])
    cov = raw.get("covariates", {})
    if cov:
        if not isinstance(cov, Mapping) or set(cov) - {"formulas"}:
            raise SweepError("[covariates] takes one key, 'formulas': a list of covariate formulas ('' for none).")
        forms = _list_of(cov.get("formulas"), "covariates.formulas", lambda x: isinstance(x, str), "strings")
        axes.append([{"model": {"covariates": f}} for f in forms])
    outc = raw.get("outcomes", {})
    if outc:
        if not isinstance(outc, Mapping) or set(outc) - {"columns"}:
            raise SweepError("[outcomes] takes one key, 'columns': a list of outcome column names.")
        cols = _list_of(outc.get("columns"), "outcomes.columns", lambda x: isinstance(x, str) and x, "column names")
        axes.append([{"data": {"outcome": c}} for c in cols])
    opts = raw.get("options", [])
    if opts:
        if not isinstance(opts, list):
            raise _err("options", opts, "an array of tables ([[options]])")
        ax = []
        for i, o in enumerate(opts):
            bad = sorted(set(o) - _OPTION_KEYS)
            if bad:
                raise SweepError(
                    f"unknown key(s) {bad} in [[options]] number {i + 1}; allowed keys are {sorted(_OPTION_KEYS)}."
                )
            ov: dict = {}
            m = {k: o[k] for k in ("family", "log_outcome", "missing") if k in o}
            if m:
                ov["model"] = m
            if "threshold" in o:
                ov["decision"] = {"threshold": o["threshold"]}
            if not ov:
                raise SweepError(
                    f"[[options]] number {i + 1} changes nothing; give at least one of "
                    f"{sorted(_OPTION_KEYS - {'label'})}."
                )
            if "label" in o:
                ov["label"] = str(o["label"])
            ax.append(ov)
        axes.append(ax)
    return axes


def _explicit(raw: Mapping, adopters: set[str], comparisons: list[str]) -> list[dict]:
    out = []
    vs = raw.get("variant", [])
    if not isinstance(vs, list):
        raise _err("variant", vs, "an array of tables ([[variant]])")
    for i, v in enumerate(vs):
        bad = sorted(set(v) - _VARIANT_KEYS)
        if bad:
            raise SweepError(
                f"unknown key(s) {bad} in [[variant]] number {i + 1}; allowed keys are {sorted(_VARIANT_KEYS)}."
            )
        ov: dict = {}
        for sec in ("priors", "model", "policy"):
            if sec in v:
                if not isinstance(v[sec], Mapping):
                    raise _err(f"variant[{i}].{sec}", v[sec], "a table")
                ov[sec] = dict(v[sec])
        if "outcome" in v:
            ov["data"] = {"outcome": v["outcome"]}
        if "threshold" in v:
            ov["decision"] = {"threshold": v["threshold"]}
        if "drop" in v:
            d = _list_of(v["drop"], f"variant[{i}].drop", lambda x: isinstance(x, str), "jurisdiction names")
            for c in d:
                if c not in comparisons:
                    raise _err(f"variant[{i}].drop", c, "a comparison jurisdiction of the table")
            ov["drop"] = sorted(d)
        if "label" in v:
            ov["label"] = str(v["label"])
        out.append(ov)
    return out


def _combine(axes: list[list[dict]], mode: str) -> list[dict]:
    if mode == "one_at_a_time":
        return [ov for ax in axes for ov in ax]
    combos = []
    for parts in itertools.product(*axes):
        ov: dict = {}
        labels = []
        for p in parts:
            for k, v in p.items():
                if k == "label":
                    labels.append(v)
                elif k == "drop":
                    ov["drop"] = sorted(set(ov.get("drop", [])) | set(v))
                else:
                    ov.setdefault(k, {}).update(v)
        if labels:
            ov["label"] = " + ".join(labels)
        combos.append(ov)
    return combos


def load_sweep(path: str | Path) -> SweepPlan:
    """Read and validate a sweep file; resolve every variant (study, id, seed).

    Raises
    ------
    SweepError
        For a missing or malformed sweep file, unknown keys (with the allowed list), bad values
        (naming the key), or a variant whose study does not validate (naming the variant).
    StudyError, DataRoleError
        From the base study and its table.
    """
    from ..data import file_sha256, read_table

    path = Path(path)
    if not path.is_file():
        raise SweepError(f"sweep file '{path}' does not exist; give the path to a .toml sweep file.")
    text = path.read_text(encoding="utf-8")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SweepError(f"sweep file '{path}' is not valid TOML: {exc}. Fix the line it names.") from None
    unknown = sorted(set(raw) - _TOP)
    if unknown:
        raise SweepError(f"unknown key(s) {unknown} at the top of the sweep file; allowed keys are {sorted(_TOP)}.")
    if not isinstance(raw.get("study"), str):
        raise _err("study", raw.get("study"), "the path of the base study file (relative to the sweep file)")
    sp = Path(raw["study"])
    sp = sp if sp.is_absolute() else (path.parent / sp)
    base = load_study(sp)
    combine = raw.get("combine", "one_at_a_time")
    if combine not in ("one_at_a_time", "grid"):
        raise _err("combine", combine, "'one_at_a_time' or 'grid'")
    samp = raw.get("sampler", {})
    if not isinstance(samp, Mapping) or set(samp) - {"chains", "draws", "tune", "seed"}:
        raise SweepError(
            "[sampler] in a sweep file takes chains, draws, tune and seed only; found "
            f"{sorted(samp) if isinstance(samp, Mapping) else samp!r}."
        )
    if samp:
        base = base.replace(sampler=dict(samp))
    base_raw = study_to_dict(base)
    base_dir = sp.parent.resolve()

    frame = read_table(base.table)
    jcol = base.columns.jurisdiction
    adopters = {a for a, _ in base.policy.adopters}
    comparisons = sorted(str(j) for j in frame[jcol].astype(str).unique() if str(j) not in adopters)
    del frame
    overrides = [{}] + _combine(_axes(raw, comparisons, adopters), combine) + _explicit(raw, adopters, comparisons)

    shas: dict[str, str] = {}
    variants, seen = [], {}
    for ov in overrides:
        label = ov.get("label") or _label(ov)
        ov = {k: v for k, v in ov.items() if k != "label"}
        merged = _merge(base_raw, ov)
        try:
            st = _parse(merged, base_dir)
        except BayesDidError as exc:
            raise SweepError(f"variant '{label}' does not make a valid study: {exc}") from None
        lacks = sorted(set(ov.get("priors") or {}) - set(study_priors(st)))
        if lacks:
            raise SweepError(
                f"variant '{label}' sets the prior(s) {lacks}, which the model of this study does not have "
                f"(family {st.model.family}, {'DDD' if st.columns.group else 'DiD'}, "
                f"{len(st.policy.adopters)} adopter(s), {'with' if st.model.covariates else 'no'} covariates): "
                f"sweeping it would change nothing. Its priors are {list(study_priors(st))}."
            )
        tbl = str(st.table)
        if tbl not in shas:
            shas[tbl] = file_sha256(st.table)
        resolved = study_to_dict(st)
        vid = variant_id(resolved, ov.get("drop", []), base.sampler.seed, shas[tbl])
        if vid in seen:  # the same content twice (say a grid point equal to the base): run it once
            continue
        seen[vid] = label
        seed = derived_seed(base.sampler.seed, vid)
        resolved["sampler"]["seed"] = seed
        variants.append(Variant(label=label, overrides=ov, id=vid, seed=seed, raw=resolved))
    title = raw.get("title", f"sweep of {base.title}")
    return SweepPlan(
        path=path.resolve(),
        base=base,
        variants=variants,
        combine=combine,
        title=str(title),
        sha256=hashlib.sha256(text.encode()).hexdigest(),
        data_sha256=shas,
    )
