# The last steps: figures (one job per cohort, figures/<cohort>/, and one for the study-level and
# pooled ones, figures/_study/) and the self-contained HTML report (report.html). All read only
# the study-level tables and the spec; reruns give the same bytes.

# Every study-level table the run writes (the pooled ones too in consortium mode).
UNBIN_REPORT_TABLES = (
    list(STUDY_TABLES) + (list(POOLED_TABLES) if UNBIN_CONSORTIUM else []) + UNBIN_PUBLISHED_TABLES
)


# A cohort's figures need only the tables of the cohorts' jobs: they are drawn while the
# bundles are pooled.
rule draw_figures:
    input:
        expand("tables/{table}.parquet", table=STUDY_TABLES),
    output:
        directory("figures/{cohort}"),
    log:
        "logs/figures/{cohort}.log",
    benchmark:
        "benchmarks/draw_figures/{cohort}.tsv"
    params:
        digests=study_params(UNBIN_SPEC),
    script:
        "../scripts/draw_figures.py"


# The study-level and pooled figures: a job of their own, drawn beside the cohorts' ones.
rule draw_study_figures:
    input:
        expand("tables/{table}.parquet", table=UNBIN_REPORT_TABLES),
    output:
        directory("figures/_study"),
    log:
        "logs/figures/_study.log",
    benchmark:
        "benchmarks/draw_study_figures/all.tsv"
    params:
        digests=study_params(UNBIN_SPEC),
    script:
        "../scripts/draw_study_figures.py"


rule build_report:
    input:
        tables=expand("tables/{table}.parquet", table=UNBIN_REPORT_TABLES),
        figures=expand("figures/{cohort}", cohort=UNBIN_COHORTS),
        study="figures/_study",
    output:
        report="report.html",
    log:
        "logs/report.log",
    benchmark:
        "benchmarks/build_report/all.tsv"
    params:
        digests=study_params(UNBIN_SPEC),
    script:
        "../scripts/build_report.py"
