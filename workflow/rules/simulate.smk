# One job per scenario x estimator x range of seed blocks; the engine does the work.
# update(): Snakemake keeps an existing shard while the job runs, so a job whose
# range grew (more replicates) or that was killed reuses the blocks already there.
rule shard:
    input:
        code=lambda w: jobs.estimator_sources(STUDY, w.estimator),
    output:
        update(f"{RESULTS}/shards/{{scenario}}/{{estimator}}/{{first_block}}.parquet"),
    params:
        spec=lambda w: jobs.shard_spec_json(STUDY, w.scenario, w.estimator, int(w.first_block)),
    log:
        f"{RESULTS}/logs/shards/{{scenario}}/{{estimator}}/{{first_block}}.log",
    resources:
        mem_mb=1000,
        runtime=60,
    shell:
        "{PYTHON} -m estbench.shard --spec {params.spec:q} {SEARCH_ARGS} --out {output:q} 2> {log:q}"
