# One job per (cohort, analysis) for the fits and the question tables built from them, and one
# for the resampling questions.
# Reruns follow content digests (params), not timestamps: the extract's SHA-256 and the digest of
# the spec entries this analysis uses.


rule fit_analysis:
    input:
        extract=lambda w: str(UNBIN_SPEC.cohort(w.cohort).path),
        basis=lambda w: f"common/{w.analysis}.json" if UNBIN_DERIVED_BASIS[w.analysis] else [],
    output:
        expand("work/{{cohort}}/{{analysis}}/{table}.parquet", table=FIT_JOB_TABLES),
        handover=f"work/{{cohort}}/{{analysis}}/{HANDOVER}",
    log:
        "logs/fit/{cohort}/{analysis}.log",
    benchmark:
        "benchmarks/fit_analysis/{cohort}/{analysis}.tsv"
    # An imputed analysis' resampling job waits for this job: its fits go first (see
    # DEVELOPERS.md, "The imputed resampling job").
    priority: lambda w: 1 if UNBIN_IMPUTED[w.analysis] else 0
    threads: 1
    resources:
        mem_mb=lambda w, attempt: analysis_memory_mb(
            UNBIN_SPEC, w.cohort, w.analysis, "fit", attempt
        ),
    params:
        digests=lambda w: analysis_params(UNBIN_SPEC, w.cohort, w.analysis),
    script:
        "../scripts/fit_analysis.py"


# The resampling questions (bootstrap, permutations) of the same analysis: a job of their own, so
# they run beside the fits on another core or cluster node. Under multiple imputation it reads
# what the fit job handed over (the imputed sets, the first set's choices, the combined tables
# its pooled tables repeat) instead of imputing and refitting every set again.
rule resample_analysis:
    input:
        extract=lambda w: str(UNBIN_SPEC.cohort(w.cohort).path),
        fitted=lambda w: (
            expand(
                "work/{c}/{a}/{f}",
                c=w.cohort,
                a=w.analysis,
                f=[HANDOVER, *(f"{t}.parquet" for t in HANDED_TABLES)],
            )
            if UNBIN_IMPUTED[w.analysis]
            else []
        ),
    output:
        expand("work/{{cohort}}/{{analysis}}/{table}.parquet", table=RESAMPLING_TABLES),
    log:
        "logs/resample/{cohort}/{analysis}.log",
    benchmark:
        "benchmarks/resample_analysis/{cohort}/{analysis}.tsv"
    threads: 1
    resources:
        mem_mb=lambda w, attempt: analysis_memory_mb(
            UNBIN_SPEC, w.cohort, w.analysis, "resample", attempt
        ),
    params:
        digests=lambda w: analysis_params(UNBIN_SPEC, w.cohort, w.analysis),
    script:
        "../scripts/resample_analysis.py"
