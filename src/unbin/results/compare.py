"""Comparing two result folders (a versioned update): which estimates moved beyond a tolerance,
which analyses were added or dropped, and the provenance behind it (which inputs or spec
entries differ). Pure: tables and provenance in, one tidy DataFrame out."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

# The estimates compared, per table: key columns and value columns.
COMPARED: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "effects": (("cohort", "analysis", "adjustment", "form", "contrast_type", "contrast"),
                ("estimate", "se")),
    "information": (("cohort", "analysis", "adjustment"),
                    ("lr_legacy", "lr_linear", "lr_spline", "info_kept")),
    "fits": (("cohort", "analysis", "adjustment", "form", "detail"), ("loglik",)),
    "pooled_effects": (("analysis", "adjustment", "form", "contrast_type", "contrast", "groups",
                        "method"), ("estimate", "se")),
}
COLUMNS = ["change", "cohort", "analysis", "table", "item", "old", "new", "difference"]


def _key_text(row: pd.Series, keys: tuple[str, ...]) -> str:
    return " / ".join(str(row[k]) for k in keys if k not in ("cohort", "analysis"))


def compare_tables(old: dict[str, pd.DataFrame], new: dict[str, pd.DataFrame],
                   tolerance: float) -> pd.DataFrame:
    """Rows for analyses added or dropped and for estimates that moved by more than
    ``tolerance`` (absolute, on the table's own scale: log ratios, mean differences, LR chi2)."""
    rows: list[dict[str, Any]] = []
    so, sn = old.get("status"), new.get("status")
    if so is not None and sn is not None:
        ko = set(zip(so["cohort"], so["analysis"], strict=True))
        kn = set(zip(sn["cohort"], sn["analysis"], strict=True))
        for c, a in sorted(kn - ko):
            rows.append({"change": "analysis added", "cohort": c, "analysis": a,
                         "table": "status"})
        for c, a in sorted(ko - kn):
            rows.append({"change": "analysis dropped", "cohort": c, "analysis": a,
                         "table": "status"})
        for c, a in sorted(ko & kn):
            o = so[(so["cohort"] == c) & (so["analysis"] == a)].iloc[0]
            n = sn[(sn["cohort"] == c) & (sn["analysis"] == a)].iloc[0]
            if o["status"] != n["status"]:
                rows.append({"change": "status changed", "cohort": c, "analysis": a,
                             "table": "status", "old": o["status"], "new": n["status"]})
    for table, (keys, values) in COMPARED.items():
        a, b = old.get(table), new.get(table)
        if a is None or b is None or a.empty or b.empty:
            continue
        keys_present = tuple(k for k in keys if k in a.columns and k in b.columns)
        m = a.merge(b, on=list(keys_present), how="inner", suffixes=("_old", "_new"))
        for col in values:
            if f"{col}_old" not in m.columns:
                continue
            ov = pd.to_numeric(m[f"{col}_old"], errors="coerce").to_numpy(float)
            nv = pd.to_numeric(m[f"{col}_new"], errors="coerce").to_numpy(float)
            diff = nv - ov
            nan_change = np.isnan(ov) != np.isnan(nv)
            moved = (np.abs(np.nan_to_num(diff)) > tolerance) | nan_change
            for i in np.flatnonzero(moved):
                r = m.iloc[i]
                rows.append({"change": "estimate moved", "cohort": r.get("cohort", ""),
                             "analysis": r["analysis"], "table": table,
                             "item": f"{_key_text(r, keys_present)}: {col}",
                             "old": float(ov[i]), "new": float(nv[i]),
                             "difference": float(diff[i])})
    out = pd.DataFrame(rows, columns=COLUMNS)
    for c in ("old", "new"):
        out[c] = out[c].astype(object).where(out[c].notna(), None).map(
            lambda v: "" if v is None else (f"{v:.6g}" if isinstance(v, float) else str(v)))
    out["difference"] = pd.to_numeric(out["difference"], errors="coerce")
    return out.fillna({"cohort": "", "item": ""})


def compare_provenance(old: dict[tuple[str, str], dict[str, Any]],
                       new: dict[tuple[str, str], dict[str, Any]]) -> pd.DataFrame:
    """Per (cohort, analysis) job: which input extracts and which spec entries differ."""
    rows = []
    for key in sorted(set(old) & set(new)):
        o, n = old[key], new[key]
        oi = {i["cohort"]: i["sha256"] for i in o.get("inputs", [])}
        ni = {i["cohort"]: i["sha256"] for i in n.get("inputs", [])}
        for c in sorted(set(oi) | set(ni)):
            if oi.get(c) != ni.get(c):
                rows.append({"change": "input changed", "cohort": key[0], "analysis": key[1],
                             "table": "provenance", "item": f"extract of {c}",
                             "old": str(oi.get(c, ""))[:12], "new": str(ni.get(c, ""))[:12]})
        if o.get("spec_digest") != n.get("spec_digest"):
            rows.append({"change": "spec changed", "cohort": key[0], "analysis": key[1],
                         "table": "provenance", "item": "spec entries of this analysis",
                         "old": str(o.get("spec_digest"))[:12],
                         "new": str(n.get("spec_digest"))[:12]})
        if o.get("versions") != n.get("versions"):
            changed = sorted(k for k in set(o.get("versions", {})) | set(n.get("versions", {}))
                             if o.get("versions", {}).get(k) != n.get("versions", {}).get(k))
            rows.append({"change": "versions changed", "cohort": key[0], "analysis": key[1],
                         "table": "provenance", "item": ", ".join(changed), "old": "",
                         "new": ""})
    return pd.DataFrame(rows, columns=COLUMNS)


def run_record(folder: Path) -> dict[str, Any]:
    """The run manifest of a result folder (``run.json``), or {} when there is none."""
    path = folder / "run.json"
    try:
        return dict(json.loads(path.read_text(encoding="utf-8")))
    except (OSError, ValueError):
        return {}


def _commit_text(git: dict[str, Any] | None) -> str:
    if not git:
        return "not in a git repository"
    state = "clean" if git.get("clean") else "uncommitted changes"
    if not git.get("spec_tracked"):
        state += "; spec not tracked"
    elif not git.get("spec_unchanged"):
        state += "; spec changed since the commit"
    return f"{str(git.get('commit', ''))[:12]} ({state})"


def compare_commits(old: dict[str, Any], new: dict[str, Any]) -> pd.DataFrame:
    """One row naming the spec's commit in each run (from ``run.json``), when either run
    recorded one, so that what moved is read beside the change of spec that moved it."""
    go, gn = old.get("spec_git"), new.get("spec_git")
    if not go and not gn:
        return pd.DataFrame(columns=COLUMNS)
    same = bool(go and gn and go.get("commit") == gn.get("commit"))
    return pd.DataFrame([{"change": "spec commit" + (" (same)" if same else ""), "cohort": "",
                          "analysis": "", "table": "run.json", "item": "spec_git",
                          "old": _commit_text(go), "new": _commit_text(gn),
                          "difference": np.nan}], columns=COLUMNS)
