# Consortium mode. Every cohort gets a share-safe bundle (bundles/<cohort>/); with several
# cohorts, each analysis first gets a common basis (knots, reference, grid) from the cohorts'
# sample summaries (never from pooled rows), and the bundles are pooled into tables/pooled_*.


rule summarise_sample:
    input:
        extract=lambda w: str(UNBIN_SPEC.cohort(w.cohort).path),
    output:
        "summaries/{cohort}/{analysis}.json",
    log:
        "logs/summarise/{cohort}/{analysis}.log",
    benchmark:
        "benchmarks/summarise_sample/{cohort}/{analysis}.tsv"
    params:
        digests=lambda w: analysis_params(UNBIN_SPEC, w.cohort, w.analysis),
    script:
        "../scripts/summarise_sample.py"


rule common_basis:
    input:
        lambda w: expand(
            "summaries/{cohort}/{analysis}.json", cohort=UNBIN_COHORTS, analysis=w.analysis
        ),
    output:
        "common/{analysis}.json",
    log:
        "logs/common/{analysis}.log",
    benchmark:
        "benchmarks/common_basis/{analysis}.tsv"
    localrule: True
    params:
        digests=lambda w: basis_params(UNBIN_SPEC, w.analysis),
    script:
        "../scripts/common_basis.py"


rule bundle_cohort:
    input:
        lambda w: expand(
            "work/{cohort}/{analysis}/{table}.parquet",
            cohort=w.cohort,
            analysis=UNBIN_ANALYSES,
            table=JOB_TABLES,
        ),
    output:
        expand("bundles/{{cohort}}/{table}.parquet", table=BUNDLE_TABLES),
    log:
        "logs/bundle/{cohort}.log",
    benchmark:
        "benchmarks/bundle_cohort/{cohort}.tsv"
    localrule: True
    params:
        digests=lambda w: cohort_params(UNBIN_SPEC, w.cohort),
    script:
        "../scripts/bundle_cohort.py"


rule pool_bundles:
    input:
        expand("bundles/{cohort}/{table}.parquet", cohort=UNBIN_COHORTS, table=BUNDLE_TABLES),
    output:
        expand("tables/{table}.parquet", table=list(POOLED_TABLES) + UNBIN_PUBLISHED_TABLES),
    log:
        "logs/pool.log",
    benchmark:
        "benchmarks/pool_bundles/all.tsv"
    localrule: True
    params:
        digests=lambda w: digest(UNBIN_SPEC.raw.get("published")),
    script:
        "../scripts/pool_bundles.py"
