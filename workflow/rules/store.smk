# The single writer of the store. update(): a failed ingest restores the previous store.
# Its inputs are the job records; the shards it loads are those the study names.
rule ingest:
    input:
        jobs=JOB_RECORDS,
        study=STUDY_FILE,
    output:
        update(STORE),
    log:
        str(LAYOUT.stage_log("ingest")),
    params:
        python=PYTHON,
    threads: 4  # DuckDB's threads, at most --cores; the numbers do not depend on them
    shell:
        "{params.python} -m estbench.analyse.store --study {input.study:q} --store {output:q} "
        "--threads {threads} 2> {log:q}"
