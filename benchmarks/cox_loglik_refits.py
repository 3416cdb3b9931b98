"""The information bootstrap's one-at-a-time Cox refits of one analysis, both ways on the same
replicates: ``refit_replicate_loglik`` (stopped on the likelihood) against
``refit_replicate(..., with_loglik=True)`` (stopped on the linear predictors), alternated per
design, with the likelihood evaluations and the CPU seconds each took and how far apart the
log partial likelihoods are; for the first replicate's first two designs also against
``fit_cox`` to tol 1e-13 on the same drawn rows.

    python benchmarks/registry.py --rows 1000000 --inputs-only --keep /tmp/reg1m
    python benchmarks/cox_loglik_refits.py /tmp/reg1m/spec.yaml registry death_egfr --replicates 3

(the replicates are the table's own first ones: the same seeded generator).
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402
from typing import Any  # noqa: E402

from unbin.models import weighted  # noqa: E402
from unbin.models.cox import fit as cox_fit  # noqa: E402
from unbin.models.cox import replicate_loglik  # noqa: E402
from unbin.pipeline import jobs  # noqa: E402
from unbin.questions import kept  # noqa: E402
from unbin.refit.analysis import bare_refit  # noqa: E402
from unbin.spec import load_spec  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("spec")
    ap.add_argument("cohort")
    ap.add_argument("analysis")
    ap.add_argument("--replicates", type=int, default=3)
    args = ap.parse_args()
    spec = load_spec(args.spec).for_cohort(args.cohort)
    a = spec.analysis(args.analysis)
    c = spec.cohort(args.cohort)
    sample = jobs.analysis_sample(jobs.read_extract(c.path, a.columns, c.csv), a, spec)
    r = bare_refit(sample, a, spec, args.cohort)
    _, models, _ = kept._point_rows(r, spec)
    o = r.outcome
    unique = list({id(m): m for m in models}.values())
    starts = weighted.cox_near_starts(o, [m.X for m in unique], [m.res.coef for m in unique])
    rng = spec.rng(a.name, "information-bootstrap")  # the table's generator
    calls = [0]
    real = cox_fit._evaluate

    def counted(*p: Any, **k: Any) -> Any:
        calls[0] += 1
        return real(*p, **k)

    cox_fit._evaluate = counted  # type: ignore[assignment]
    replicate_loglik._evaluate = counted  # type: ignore[assignment]
    evals = {"new": 0, "old": 0}
    cpu = {"new": 0.0, "old": 0.0}
    apart = newton = 0.0
    for b in range(args.replicates):
        W = weighted.design_resample_replicates(rng, o, 1).dense()
        for _, m, (t, e, entry, strata), layout in weighted.resampled_cox_samples(o, W):
            for j, mod in enumerate(unique):
                if starts[j] is None:
                    continue
                got: dict[str, Any] = {}
                for way in ("new", "old"):
                    calls[0] = 0
                    t0 = time.process_time()
                    got[way] = (replicate_loglik.refit_replicate_loglik(
                        starts[j], mod.X, m, layout) if way == "new" else
                        cox_fit.refit_replicate(starts[j], mod.X, m, layout,
                                                with_loglik=True)[1])
                    cpu[way] += time.process_time() - t0
                    evals[way] += calls[0]
                line = f"replicate {b} design {j} ({mod.X.shape[1]} columns): new - old " \
                       f"{got['new'] - got['old']:.3g}"
                apart = max(apart, abs(got["new"] - got["old"]))
                if b == 0 and j < 2:
                    ref = cox_fit.fit_cox(mod.X[m], t, e, entry=entry, strata=strata,
                                          init=mod.res.coef, layout=layout, tol=1e-13)
                    line += f", new - Newton {got['new'] - ref.loglik:.3g}, old - Newton " \
                            f"{got['old'] - ref.loglik:.3g}"
                    newton = max(newton, abs(got["new"] - ref.loglik))
                print(line, flush=True)
    print(f"evaluations: new {evals['new']}, old {evals['old']}; CPU: new {cpu['new']:.2f} s, "
          f"old {cpu['old']:.2f} s; largest |new - old| {apart:.3g}, |new - Newton| "
          f"{newton:.3g}")


if __name__ == "__main__":
    main()
