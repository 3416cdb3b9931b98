# Consortium mode. Every cohort gets a share-safe bundle (bundles/<cohort>/); with several
# cohorts, each analysis first gets a common basis (knots, reference, grid) from the cohorts'
# sample summaries (never from pooled rows), and the bundles are pooled into tables/pooled_*.


# One job per cohort summarises every analysis that needs a derived common basis
# (summaries/<cohort>/<analysis>.json); one job derives all the common bases from them.
rule summarise_sample:
    input:
        extract=lambda w: str(UNBIN_SPEC.cohort(w.cohort).path),
    output:
        directory("summaries/{cohort}"),
    log:
        "logs/summarise/{cohort}.log",
    benchmark:
        "benchmarks/summarise_sample/{cohort}.tsv"
    params:
        digests=lambda w: basis_cohort_params(UNBIN_SPEC, w.cohort, UNBIN_BASIS_ANALYSES),
    script:
        "../scripts/summarise_sample.py"


rule common_basis:
    input:
        expand("summaries/{cohort}", cohort=UNBIN_COHORTS),
    output:
        expand("common/{analysis}.json", analysis=UNBIN_BASIS_ANALYSES),
    log:
        "logs/common.log",
    benchmark:
        "benchmarks/common_basis/all.tsv"
    localrule: True
    params:
        digests=basis_params(UNBIN_SPEC, UNBIN_BASIS_ANALYSES),
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
