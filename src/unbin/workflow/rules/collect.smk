# Study-level tables: every job's tables concatenated, with study-level provenance.


rule collect_tables:
    input:
        expand(
            "work/{cohort}/{analysis}/{table}.parquet",
            cohort=UNBIN_COHORTS,
            analysis=UNBIN_ANALYSES,
            table=JOB_TABLES,
        ),
    output:
        expand("tables/{table}.parquet", table=STUDY_TABLES),
    log:
        "logs/collect.log",
    benchmark:
        "benchmarks/collect_tables/all.tsv"
    localrule: True
    params:
        digests=study_params(UNBIN_SPEC),
    script:
        "../scripts/collect_tables.py"
