# One job per scenario x range of seed blocks: it draws each block once, writes
# one shard per estimator, and ends by writing its record (the output Snakemake
# tracks). A rerun (an estimator added or edited, more replicates) recomputes
# only the shards whose own spec or code changed; the others are not touched.
rule simulate:
    input:
        code=ESTIMATOR_SOURCES,
    output:
        f"{RESULTS}/jobs/{{scenario}}/{{first_block}}.json",
    params:
        spec=lambda w: jobs.job_spec_json(STUDY, w.scenario, int(w.first_block)),
    priority: lambda w: jobs.job_values(STUDY, w.scenario, int(w.first_block))
    log:
        f"{RESULTS}/logs/jobs/{{scenario}}/{{first_block}}.log",
    resources:
        mem_mb=1000,
        runtime=60,
    shell:
        "{PYTHON} -m estbench.shard --spec {params.spec:q} {SEARCH_ARGS} --results {RESULTS:q} "
        "--record {output:q} 2> {log:q}"
