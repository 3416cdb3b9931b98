"""Wall time and peak memory of a whole `unbin run` on an invented registry extract.

    python benchmarks/registry.py                      # 1,000,000 rows, a markdown report
    python benchmarks/registry.py --rows 100000 --json # one size, one JSON object
    python benchmarks/registry.py --rows 10000000 --inputs-only --keep /tmp/reg10m
                                                       # the inputs only (then one job at a time:
                                                       # benchmarks/job_memory.py [--fit])

The extract is an invented registry (one parquet file, 20 columns, two of which no analysis
uses): ten legacy grouped analyses over all four outcome types — three logistic, three Cox (one
with delayed entry and strata), two Poisson with a person-time offset, two linear — run by
`unbin run --cores 2` in a subprocess exactly as a user would run it, with the default continuous
forms (linear, restricted cubic splines with 3, 4 or 5 knots chosen by AIC, fractional
polynomials) and moderate resampling sizes (``--bootstrap`` replicates, ``--permutations``
permutations; the defaults are 200 and 1000).

Reported: the wall time of the run; its peak memory, both as the largest resident set of any one
process (the kernel's record for the run's process tree) and as the largest sum over the tree at
one moment (sampled every 0.2 s: what the machine must hold with jobs running side by side); and
per rule, from the run manifest (``run.json``, written from Snakemake's benchmark files): jobs,
total and longest seconds, and the largest resident set. For scale, the same process first times
one reference fit — statsmodels' logistic GLM of the binary outcome on the exposure and two
covariates over all rows — and the run's wall time is also given as a multiple of it, which
carries over between machines better than seconds do.

Data generation is not timed. BLAS is limited to one thread per process (as `unbin run` does).
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import yaml  # noqa: E402

ROWS = 1_000_000
SEED = 31_415
UNUSED = ("postcode", "smoker")  # columns no analysis reads (the run must not load them)


def simulate(n: int, seed: int = SEED) -> pd.DataFrame:
    """An invented registry extract: every association is made up."""
    rng = np.random.default_rng(seed)
    age = np.clip(rng.normal(62, 12, n), 18, 95).round(1)
    sex = rng.integers(0, 2, n).astype(np.int8)
    centre = rng.integers(1, 9, n).astype(np.int8)
    bmi = np.clip(rng.lognormal(np.log(27), 0.18, n), 15, 60).round(1)
    diabetes = (rng.random(n) < 1 / (1 + np.exp(-(-3 + 0.03 * (age - 60)
                                                   + 0.12 * (bmi - 27))))).astype(np.int8)
    hba1c = np.clip(rng.normal(5.6 + 1.2 * diabetes, 0.6, n), 4, 14).round(1)
    sodium = rng.normal(139.5, 4, n).round(0)
    egfr = np.clip(105 - 0.9 * (age - 40) + rng.normal(0, 14, n), 5, 140).round(0)
    urate = np.clip(rng.normal(5.8 + 0.6 * sex, 1.4, n), 1.5, 13).round(1)
    sbp = (128 + 2 * (urate - 6) + 0.45 * (age - 62) + rng.normal(0, 14, n)).round(0)
    ldl = (3.2 + 0.03 * (bmi - 27) + rng.normal(0, 0.8, n)).round(2)

    lo = -2.3 + 0.025 * (sodium - 140) ** 2 + 0.3 * (hba1c - 5.6) + 0.02 * (age - 62)
    readmit = (rng.random(n) < 1 / (1 + np.exp(-lo))).astype(np.int8)

    lin = (0.04 * np.clip(60 - egfr, 0, None) + 0.06 * (age - 62) + 0.3 * sex
           + 0.01 * (sbp - 130) + 0.05 * (centre - 4.5))
    t_event = rng.exponential(1.0, n) / (0.03 * np.exp(lin))
    entry = rng.uniform(0, 2, n).round(2)
    censor = entry + rng.uniform(2, 10, n)
    time_ = np.minimum(t_event, censor)
    died = (t_event <= censor).astype(np.int8)
    enters = time_ > entry + 0.01  # people who died before entry never enter the registry
    time_ = np.where(enters, time_, np.nan).round(3)

    pyears = rng.uniform(0.5, 5, n).round(2)
    rate = 1.2 * np.exp(0.04 * (bmi - 27) + 0.1 * (hba1c - 5.6) + 0.01 * (age - 62))
    visits = rng.poisson(rate * pyears).astype(np.int16)

    df = pd.DataFrame({
        "patient_id": np.arange(1, n + 1, dtype=np.int64), "centre": centre, "age": age,
        "sex": sex, "bmi": bmi, "diabetes": diabetes, "hba1c": hba1c, "sodium": sodium,
        "egfr": egfr, "urate": urate, "sbp": sbp, "ldl": ldl, "readmit30": readmit,
        "entry_years": entry, "followup_years": time_, "died": died, "visits": visits,
        "person_years": pyears,
        "postcode": np.char.add("PC", rng.integers(1000, 9999, n).astype(str)),
        "smoker": rng.integers(0, 2, n).astype(np.int8),
    })
    for col, share in (("sodium", 0.01), ("urate", 0.02), ("bmi", 0.005), ("hba1c", 0.03)):
        df.loc[rng.random(n) < share, col] = np.nan
    # the cause of death for the competing-risk variant (drawn last: the other columns keep
    # their values): 1 kidney-related, more often at low eGFR; 2 any other cause
    kidney = 1 / (1 + np.exp(-(-0.5 + 0.03 * (60 - egfr))))
    df["death_cause"] = np.where(died == 1, np.where(rng.random(n) < kidney, 1, 2),
                                 0).astype(np.int8)
    return df


def spec(bootstrap: int, permutations: int, imputations: int = 0,
         only: tuple[str, ...] = (), competing: bool = False) -> dict[str, Any]:
    """The benchmark's spec; ``imputations`` > 0: the missing-data variant (every analysis
    imputes its missing values, M sets of 5 iterations); ``competing``: an eleventh analysis,
    death from a kidney-related cause with other deaths competing (``death_egfr_competing``);
    ``only``: these analyses alone."""
    out = _spec(bootstrap, permutations)
    if competing:
        out["analyses"].append(
            {"name": "death_egfr_competing",
             "outcome": {"type": "survival", "time": "followup_years", "event": "death_cause",
                         "event_of_interest": 1, "competing": [2], "entry": "entry_years",
                         "horizon": 5},
             "exposure": "egfr", "adjust": ["age", "sex"]})
    if imputations:
        out["missing"] = {"method": "impute", "imputations": imputations, "iterations": 5}
    if only:
        out["analyses"] = [a for a in out["analyses"] if a["name"] in only]
    return out


def _spec(bootstrap: int, permutations: int) -> dict[str, Any]:
    surv = {"type": "survival", "time": "followup_years", "event": "died"}
    return {
        "study": "registry-benchmark",
        "cohorts": [{"name": "registry", "path": "data/registry.parquet"}],
        "variables": {"centre": {"type": "categorical"}},
        "groupings": {
            "sodium": {"cuts": [135, 145], "labels": ["low", "normal", "high"],
                       "reference": "normal"},
            "hba1c": {"cuts": [5.7, 6.5]},
            "bmi": {"cuts": [25, 30]},
            "egfr": {"cuts": [30, 45, 60], "reference": ">=60"},
            "sbp": {"cuts": [120, 140, 160]},
            "age": {"cuts": [50, 60, 70]},
            "urate": {"cuts": [7.1], "derived_from_data": True},
        },
        "analyses": [
            {"name": "readmit_sodium", "outcome": {"type": "binary", "event": "readmit30"},
             "exposure": "sodium", "adjust": ["age", "sex"], "by": "diabetes"},
            {"name": "readmit_hba1c", "outcome": {"type": "binary", "event": "readmit30"},
             "exposure": "hba1c", "adjust": ["age", "sex", "bmi"]},
            {"name": "readmit_bmi", "outcome": {"type": "binary", "event": "readmit30"},
             "exposure": "bmi", "adjust": ["age", "sex"]},
            {"name": "death_egfr", "outcome": {**surv, "entry": "entry_years", "horizon": 5},
             "exposure": "egfr", "adjust": ["age", "sex"], "strata": ["centre"]},
            {"name": "death_sbp", "outcome": surv, "exposure": "sbp", "adjust": ["age", "sex"]},
            {"name": "death_age", "outcome": surv, "exposure": "age",
             "adjust": ["sex", "diabetes"]},
            {"name": "visits_bmi",
             "outcome": {"type": "count", "count": "visits", "persontime": "person_years"},
             "exposure": "bmi", "adjust": ["age", "diabetes"]},
            {"name": "visits_hba1c",
             "outcome": {"type": "count", "count": "visits", "persontime": "person_years"},
             "exposure": "hba1c", "adjust": ["age", "sex"]},
            {"name": "sbp_urate", "outcome": {"type": "continuous", "value": "sbp"},
             "exposure": "urate", "adjust": ["age", "sex"]},
            {"name": "ldl_bmi", "outcome": {"type": "continuous", "value": "ldl"},
             "exposure": "bmi", "adjust": ["age", "sex"]},
        ],
        "continuous": {"forms": ["linear", "spline", "fp"]},
        "risk_thresholds": [0.1, 0.2],
        "resampling": {"bootstrap": bootstrap, "permutations": permutations},
        "seed": SEED,
    }


def write_inputs(folder: Path, rows: int, bootstrap: int, permutations: int,
                 imputations: int = 0, only: tuple[str, ...] = (),
                 competing: bool = False) -> Path:
    (folder / "data").mkdir(parents=True, exist_ok=True)
    simulate(rows).to_parquet(folder / "data" / "registry.parquet", index=False)
    path = folder / "spec.yaml"
    path.write_text("# Invented registry for benchmarks/registry.py\n"
                    + yaml.safe_dump(spec(bootstrap, permutations, imputations, only, competing),
                                     sort_keys=False),
                    encoding="utf-8")
    return path


def reference_fit_seconds(extract: Path) -> float:
    """One statsmodels logistic GLM over every complete row: readmission on sodium, age, sex."""
    import pyarrow.parquet as pq
    import statsmodels.api as sm

    df = pq.read_table(extract, columns=["readmit30", "sodium", "age", "sex"]).to_pandas()
    df = df.dropna()
    X = sm.add_constant(df[["sodium", "age", "sex"]].to_numpy(float))
    start = time.perf_counter()
    sm.GLM(df["readmit30"].to_numpy(float), X, family=sm.families.Binomial()).fit()
    return time.perf_counter() - start


class TreeMemory(threading.Thread):
    """Samples the summed resident set of a process and its descendants."""

    def __init__(self, pid: int, every: float = 0.2):
        super().__init__(daemon=True)
        self.pid, self.every = pid, every
        self.peak_bytes = 0
        self.stop = threading.Event()

    def run(self) -> None:
        import psutil  # a dependency of Snakemake

        try:
            root = psutil.Process(self.pid)
        except psutil.NoSuchProcess:
            return
        while not self.stop.is_set():
            total = 0
            try:
                procs = [root, *root.children(recursive=True)]
            except psutil.NoSuchProcess:
                return
            for p in procs:
                try:
                    total += p.memory_info().rss
                except (psutil.NoSuchProcess, psutil.AccessDenied):
                    pass
            self.peak_bytes = max(self.peak_bytes, total)
            self.stop.wait(self.every)


def run_unbin(spec_path: Path, out: Path, cores: int) -> dict[str, Any]:
    cmd = [sys.executable, "-m", "unbin.cli", "run", str(spec_path), "--out", str(out),
           "--cores", str(cores), "--quiet"]
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    watcher = TreeMemory(proc.pid)
    watcher.start()
    output, _ = proc.communicate()
    wall = time.perf_counter() - start
    watcher.stop.set()
    watcher.join()
    if proc.returncode != 0:
        raise SystemExit(f"unbin run failed (exit {proc.returncode}):\n{output}")
    # ru_maxrss of waited-for children: the largest single process of the tree (KiB on Linux).
    maxrss_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    manifest = json.loads((out / "run.json").read_text())
    status = pd.read_parquet(out / "tables" / "status.parquet")
    return {
        "wall_seconds": round(wall, 1),
        "peak_process_mb": round(max(maxrss_kib, before) / 1024, 1),
        "peak_tree_mb": round(watcher.peak_bytes / 2**20, 1),
        "rules": manifest["rules"],
        "statuses": {str(k): int(v) for k, v in status["status"].value_counts().items()},
        "slowest_jobs": slowest_jobs(out),
        "memory_requests": memory_requests(out, spec_path),
    }


def slowest_jobs(out: Path, k: int = 5) -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = []
    for tsv in (out / "benchmarks").glob("*/**/*.tsv"):
        row = pd.read_csv(tsv, sep="\t").iloc[0]
        rel = tsv.relative_to(out / "benchmarks")
        rows.append({"job": str(rel.with_suffix("")), "seconds": round(float(row["s"]), 1),
                     "max_rss_mb": float(row["max_rss"]) if row["max_rss"] != "-" else None})
    return sorted(rows, key=lambda r: -r["seconds"])[:k]


def memory_requests(out: Path, spec_path: Path) -> dict[str, Any]:
    """Each fit and resampling job's peak (Snakemake's max_rss) against the memory it asked for
    (``pipeline.memory``): the largest share, and the jobs whose peak exceeded the request (on a
    cluster that enforces requests, they would have been killed and retried)."""
    from unbin.pipeline.workflow_support import analysis_memory_mb
    from unbin.spec import load_spec

    spec = load_spec(spec_path)
    shares: list[dict[str, Any]] = []
    for rule, job in (("fit_analysis", "fit"), ("resample_analysis", "resample")):
        for tsv in sorted((out / "benchmarks" / rule).glob("*/*.tsv")):
            row = pd.read_csv(tsv, sep="\t").iloc[0]
            if row["max_rss"] == "-":
                continue
            cohort, analysis = tsv.parent.name, tsv.stem
            asked = analysis_memory_mb(spec, cohort, analysis, job, 1)
            shares.append({"job": f"{rule}/{cohort}/{analysis}", "asked_mb": asked,
                           "peak_mb": round(float(row["max_rss"]), 1),
                           "share": round(float(row["max_rss"]) / asked, 3)})
    return {"largest_share": max((r["share"] for r in shares), default=None),
            "over": [r for r in shares if r["share"] > 1.0],
            "asked_mb_total": sum(r["asked_mb"] for r in shares)}


def measure(rows: int, cores: int, bootstrap: int, permutations: int,
            folder: Path, imputations: int = 0, only: tuple[str, ...] = (),
            competing: bool = False) -> dict[str, Any]:
    spec_path = write_inputs(folder, rows, bootstrap, permutations, imputations, only,
                             competing)
    extract = folder / "data" / "registry.parquet"
    ref = reference_fit_seconds(extract)
    result = run_unbin(spec_path, folder / "out", cores)
    import pyarrow.parquet as pq

    import unbin

    return {
        "rows": rows, "columns": len(pq.read_schema(extract).names),
        "analyses": len(spec(bootstrap, permutations, imputations, only,
                             competing)["analyses"]),
        "cores": cores, "imputations": imputations,
        "bootstrap": bootstrap,
        "permutations": permutations, "extract_mb": round(extract.stat().st_size / 2**20, 1),
        **result,
        "reference_fit_seconds": round(ref, 3),
        "wall_in_reference_fits": round(result["wall_seconds"] / ref, 1),
        "unbin": unbin.__version__, "python": platform.python_version(),
        "machine": f"{platform.machine()}, {os.cpu_count()} cpus",
    }


def markdown(r: dict[str, Any]) -> str:
    lines = [
        f"{r['rows']:,} rows, {r['analyses']} analyses, {r['cores']} cores, bootstrap "
        f"{r['bootstrap']}, permutations {r['permutations']} ({r['machine']}):",
        "",
        f"- wall time {r['wall_seconds']:.0f} s ({r['wall_in_reference_fits']:.0f} reference "
        f"logistic fits of {r['reference_fit_seconds']:.2f} s)",
        f"- peak memory: {r['peak_process_mb']:,.0f} MB in one process, "
        f"{r['peak_tree_mb']:,.0f} MB summed over the run's processes",
        "",
        "| rule | jobs | seconds (total) | seconds (longest job) | peak memory (MB) |",
        "| --- | ---: | ---: | ---: | ---: |",
    ]
    for rule, v in sorted(r["rules"].items(), key=lambda kv: -kv[1]["seconds_total"]):
        lines.append(f"| {rule} | {v['jobs']} | {v['seconds_total']:.1f} | "
                     f"{v['seconds_max']:.1f} | {v['max_rss_mb']:,.0f} |")
    lines += ["", "Slowest jobs: " + ", ".join(f"{j['job']} {j['seconds']:.0f} s"
                                               for j in r["slowest_jobs"])]
    req = r["memory_requests"]
    if req["largest_share"] is not None:
        lines += ["", f"Memory requests: the largest peak was {req['largest_share']:.0%} of its "
                      f"job's request; {len(req['over'])} job(s) over their request"
                      + "".join(f"; {o['job']} {o['peak_mb']:,.0f} of {o['asked_mb']:,} MB"
                                for o in req["over"])]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, default=ROWS, help="rows of the extract")
    parser.add_argument("--cores", type=int, default=2, help="cores for `unbin run`")
    parser.add_argument("--bootstrap", type=int, default=50, help="bootstrap replicates")
    parser.add_argument("--permutations", type=int, default=200, help="permutations")
    parser.add_argument("--keep", type=Path, default=None,
                        help="write inputs and results here and keep them (default: a temporary "
                             "folder, removed afterwards)")
    parser.add_argument("--imputations", type=int, default=0,
                        help="the missing-data variant: impute every analysis' missing values "
                             "(M sets; 0, the default: complete cases)")
    parser.add_argument("--only", default="",
                        help="comma-separated analysis names to run (default: all ten)")
    parser.add_argument("--competing", action="store_true",
                        help="add the competing-risk analysis death_egfr_competing")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--inputs-only", action="store_true",
                        help="write the spec and extract into --keep and stop (for measuring "
                             "single jobs at this size with benchmarks/job_memory.py)")
    args = parser.parse_args(argv)
    if args.inputs_only:
        if args.keep is None:
            parser.error("--inputs-only needs --keep FOLDER (where the inputs go)")
        spec_path = write_inputs(args.keep, args.rows, args.bootstrap, args.permutations,
                                 args.imputations, tuple(n for n in args.only.split(",") if n),
                                 args.competing)
        print(spec_path)
        return 0
    folder = args.keep or Path(tempfile.mkdtemp(prefix="unbin-registry-"))
    try:
        result = measure(args.rows, args.cores, args.bootstrap, args.permutations, folder,
                         args.imputations, tuple(n for n in args.only.split(",") if n),
                         args.competing)
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)
    print(json.dumps(result, indent=1, default=str) if args.json else markdown(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
