# One job per scenario x range of seed blocks: it draws each block once, writes
# one shard per estimator, and ends by writing its record (the output Snakemake
# tracks). A rerun (an estimator added or edited, more replicates) recomputes
# only the shards whose own spec or code changed; the others are not touched.
rule simulate:
    input:
        code=ESTIMATOR_SOURCES,
    output:
        str(LAYOUT.job_record("{scenario}", "{first_block}")),
    params:
        spec=lambda w: jobs.job_spec_json(STUDY, w.scenario, int(w.first_block)),
        python=PYTHON,
        search=SEARCH_ARGS,
    priority: lambda w: jobs.job_values(STUDY, w.scenario, int(w.first_block))
    log:
        str(LAYOUT.job_log("{scenario}", "{first_block}")),
    resources:
        mem_mb=1000,
        runtime=60,
    shell:
        "{params.python} -m estbench.simulate.job --spec {params.spec:q} {params.search} "
        "--record {output:q} 2> {log:q}"
