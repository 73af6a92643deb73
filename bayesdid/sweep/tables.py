"""The sweep's tables: one summary row per variant, summary.csv, verdict.json and the manifest; the verdict."""

from __future__ import annotations

import csv
import io
import json
import time
from collections.abc import Iterable, Mapping
from pathlib import Path

from ..contracts import SWEEP_SUMMARY_COLUMNS, SweepVerdict, run_id
from ..outputs import atomic_write
from ..study import study_to_dict
from ..version import __version__
from .spec import SweepPlan, Variant, _plain_json

#: Columns of DIR/summary.csv, in order (declared in :mod:`bayesdid.contracts`). Effect figures are the
#: ATT on the model scale (log units for a log outcome); ``pct_*`` are the percent change exp(ATT) - 1
#: when the outcome is logged.
SUMMARY_COLUMNS = list(SWEEP_SUMMARY_COLUMNS)


def _row(v: Variant, status: str, summary: dict | None, error: str = "") -> dict:
    row = {c: "" for c in SUMMARY_COLUMNS}
    row.update(id=v.id, label=v.label, status=status, overrides=_plain_json(v.overrides), seed=v.seed, error=error)
    if summary:
        e = summary["effect"]
        row.update(
            effect_mean=e["mean"],
            effect_sd=e["sd"],
            eti90_low=e["eti_90"][0],
            eti90_high=e["eti_90"][1],
            eti95_low=e["eti_95"][0],
            eti95_high=e["eti_95"][1],
            hdi90_low=e["hdi_90"][0],
            hdi90_high=e["hdi_90"][1],
            prob_gt_0=e["prob_gt_0"],
            prob_lt_0=e["prob_lt_0"],
            threshold=e["threshold"] if e["threshold"] is not None else "",
            prob_beyond_threshold=e["prob_beyond_threshold"] if e["prob_beyond_threshold"] is not None else "",
        )
        if "effect_percent" in summary:
            p = summary["effect_percent"]
            row.update(pct_mean=p["mean"], pct_eti90_low=p["eti_90"][0], pct_eti90_high=p["eti_90"][1])
        d = summary["diagnostics"]
        row.update(
            diagnostics_ok=d["ok"],
            rhat_max=d["rhat_max"],
            ess_bulk_min=d["ess_bulk_min"],
            divergences=d["divergences"],
            sample_s=summary["timing"].get("sample_s", ""),
        )
        if "sensitivity" in summary:
            row["sensitivity_ok"] = summary["sensitivity"].get("ok")
    return row


def _write_tables(out: Path, plan: SweepPlan, rows: list[dict], meta: dict) -> dict:
    from ..run import versions

    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=SUMMARY_COLUMNS, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow(r)
    atomic_write(out / "summary.csv", buf.getvalue())
    ver = verdict(rows)
    typed = SweepVerdict.from_dict(ver, what="the sweep's verdict")  # the contract the report reads
    atomic_write(out / "verdict.json", json.dumps(typed.to_dict(), indent=2, default=str) + "\n")
    by_id = {r["id"]: r for r in rows}
    manifest = {
        "bayesdid": __version__,
        "kind": "bayesdid sweep",
        "updated": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        **plan.describe(),
        "base_study": study_to_dict(plan.base),
        "base_seed": plan.base.sampler.seed,
        "data_sha256": plan.data_sha256,
        "base_data_sha256": plan.data_sha256.get(str(plan.base.table)),
        "run_id": run_id(plan.data_sha256.get(str(plan.base.table)), study_to_dict(plan.base)),
        "versions": versions(),
        **meta,
        "variants": [
            {
                "id": v.id,
                "label": v.label,
                "overrides": v.overrides,
                "seed": v.seed,
                "status": by_id[v.id]["status"],
                "folder": f"variants/{v.id}",
                **({"error": by_id[v.id]["error"]} if by_id[v.id]["error"] else {}),
            }
            for v in plan.variants
        ],
        "files": ["summary.csv", "manifest.json", "verdict.json", "variants/"],
    }
    atomic_write(out / "manifest.json", json.dumps(manifest, indent=2, default=str) + "\n")
    return ver


# ---- verdict -----------------------------------------------------------------------------------
def _side(lo: float, hi: float) -> str:
    return "below zero" if hi < 0 else ("above zero" if lo > 0 else "spans zero")


def verdict(rows: Iterable[Mapping], *, base_id: str | None = None) -> dict:
    """Does the answer hold across variants? A small table for the report (DIR/verdict.json).

    Checks, each against the base variant (the first row unless ``base_id``):

    * sign: the sign of the posterior median of the effect (P(effect < 0) > 0.5 reads negative);
    * interval: the side of zero of the 90% equal-tailed interval (below, above, or spans zero);
    * decision: P(effect beyond the decision threshold) on the same side of 0.5 as in the base
      (not applicable without a threshold).

    ``moves_most`` names the variant whose effect mean is furthest from the base, in units of the
    base posterior sd, ``|mean_v - mean_base| / sd_base``; ``moves_probability_most`` the one whose
    P(beyond threshold) moves most. Failed or missing variants are counted, never judged.

    Returns
    -------
    dict: ``base``, ``judged``, ``not_judged``, ``checks`` (list of {check, base, holds, held_by,
    of, breaks: [ids]}), ``holds`` (all applicable checks hold), ``moves_most``,
    ``moves_probability_most``, ``rows`` (per variant: id, label, sign, interval, prob_beyond,
    shift_sd).
    """
    rows = [dict(r) for r in rows]
    done = [r for r in rows if r.get("status") == "done"]
    out: dict = {"judged": len(done), "not_judged": [r["id"] for r in rows if r.get("status") != "done"]}
    if not done:
        out.update(status="not applicable", reason="no finished variant to judge", checks=[], holds=None)
        return out
    want = base_id if base_id is not None else rows[0]["id"]
    base = next((r for r in done if r["id"] == want), None)
    if base is None:
        out.update(status="not applicable", reason="the base variant did not finish", checks=[], holds=None)
        return out
    f = float

    def sign(r):
        return "negative" if f(r["prob_lt_0"]) > 0.5 else "positive"

    def side(r):
        return _side(f(r["eti90_low"]), f(r["eti90_high"]))

    has_thr = base.get("prob_beyond_threshold") not in ("", None)

    def decide(r):
        return None if r.get("prob_beyond_threshold") in ("", None) else f(r["prob_beyond_threshold"]) > 0.5

    checks = []
    for name, fn, desc in (
        ("sign", sign, "sign of the effect (posterior median)"),
        ("interval", side, "90% interval's side of zero"),
        ("decision", decide, "P(beyond threshold) on the same side of 0.5"),
    ):
        if name == "decision" and not has_thr:
            checks.append(
                {
                    "check": name,
                    "what": desc,
                    "status": "not applicable",
                    "reason": "the study sets no decision threshold",
                    "holds": None,
                }
            )
            continue
        b = fn(base)
        breaks = [r["id"] for r in done if fn(r) != b]
        checks.append(
            {
                "check": name,
                "what": desc,
                "base": b,
                "holds": not breaks,
                "held_by": len(done) - len(breaks),
                "of": len(done),
                "breaks": breaks,
            }
        )
    sd = f(base["effect_sd"]) or 1.0
    table = []
    for r in done:
        table.append(
            {
                "id": r["id"],
                "label": r["label"],
                "effect_mean": f(r["effect_mean"]),
                "sign": sign(r),
                "interval": side(r),
                "eti_90": [f(r["eti90_low"]), f(r["eti90_high"])],
                "prob_beyond_threshold": f(r["prob_beyond_threshold"]) if has_thr and decide(r) is not None else None,
                "shift_sd": abs(f(r["effect_mean"]) - f(base["effect_mean"])) / sd,
            }
        )
    others = [t for t in table if t["id"] != base["id"]]
    mm = max(others, key=lambda t: t["shift_sd"]) if others else None
    out.update(
        base=base["id"],
        checks=checks,
        holds=all(c["holds"] for c in checks if c["holds"] is not None),
        moves_most=mm
        and {"id": mm["id"], "label": mm["label"], "effect_mean": mm["effect_mean"], "shift_sd": mm["shift_sd"]},
        rows=table,
        status="ok",
    )
    if has_thr and others:
        bp = f(base["prob_beyond_threshold"])
        mp = max(others, key=lambda t: abs((t["prob_beyond_threshold"] or bp) - bp))
        out["moves_probability_most"] = {
            "id": mp["id"],
            "label": mp["label"],
            "prob_beyond_threshold": mp["prob_beyond_threshold"],
            "change": (mp["prob_beyond_threshold"] or bp) - bp,
        }
    return out
