# One job per (cohort, analysis): every fit and every question table of that analysis.
# Reruns follow content digests (params), not timestamps: the extract's SHA-256 and the digest of
# the spec entries this analysis uses.


rule fit_analysis:
    input:
        extract=lambda w: str(UNBIN_SPEC.cohort(w.cohort).path),
        basis=lambda w: f"common/{w.analysis}.json" if UNBIN_DERIVED_BASIS[w.analysis] else [],
    output:
        expand("work/{{cohort}}/{{analysis}}/{table}.parquet", table=JOB_TABLES),
    params:
        digests=lambda w: analysis_params(UNBIN_SPEC, w.cohort, w.analysis),
    log:
        "logs/fit/{cohort}/{analysis}.log",
    benchmark:
        "benchmarks/fit_analysis/{cohort}/{analysis}.tsv"
    threads: 1
    resources:
        mem_mb=lambda w, attempt: 1000 * attempt,
    script:
        "../scripts/fit_analysis.py"
