# One job per run of pieces (scenario x range of seed blocks; small pieces of a
# wide grid are packed together): it draws each block once, writes one shard
# per piece and estimator, and ends by writing its record (the output Snakemake
# tracks). A rerun (an estimator added or edited, more replicates) recomputes
# only the shards whose own spec or code changed; the others are not touched.

# Each job reads its spec from a file (a packed job's spec can be longer than a
# command line allows). The input function writes the file as the DAG is built,
# rewriting it only when the spec changed, so a changed spec reruns its job and
# nothing else.
rule simulate:
    input:
        spec=lambda w: str(jobs.write_job_spec(STUDY, LAYOUT, w.scenario, int(w.first_block))),
        code=ESTIMATOR_SOURCES,
    output:
        str(LAYOUT.job_record("{scenario}", "{first_block}")),
    params:
        python=PYTHON,
        search=SEARCH_ARGS,
    priority: lambda w: jobs.job_values(STUDY, w.scenario, int(w.first_block))
    log:
        str(LAYOUT.job_log("{scenario}", "{first_block}")),
    resources:
        mem_mb=1000,
        runtime=60,
    shell:
        "{params.python} -m estbench.simulate.job --spec {input.spec:q} {params.search} "
        "--record {output:q} 2> {log:q}"
