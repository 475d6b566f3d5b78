# estbench workflow: table of contents only. Run it with `estbench run STUDY.yaml`,
# or directly: snakemake --cores 2 --configfile STUDY.yaml
include: "workflow/rules/common.smk"
include: "workflow/rules/simulate.smk"
include: "workflow/rules/store.smk"
include: "workflow/rules/report.smk"

localrules: all, ingest, report


rule all:
    default_target: True
    input:
        REPORT_HTML,
        PERFORMANCE_CSV,
