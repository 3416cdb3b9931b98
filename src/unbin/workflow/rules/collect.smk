# Study-level tables: every job's tables concatenated, with study-level provenance.


rule collect_tables:
    localrule: True
    input:
        expand(
            "work/{cohort}/{analysis}/{table}.parquet",
            cohort=UNBIN_COHORTS,
            analysis=UNBIN_ANALYSES,
            table=JOB_TABLES,
        ),
    output:
        expand("tables/{table}.parquet", table=STUDY_TABLES),
    params:
        digests=study_params(UNBIN_SPEC),
    log:
        "logs/collect.log",
    benchmark:
        "benchmarks/collect_tables/all.tsv"
    script:
        "../scripts/collect_tables.py"
