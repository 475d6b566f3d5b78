# The single writer of the store. update(): a failed ingest restores the previous store.
# Its inputs are the job records; the shards it loads are those the study names.
rule ingest:
    input:
        jobs=JOB_RECORDS,
        study=STUDY_FILE,
    output:
        update(STORE),
    log:
        f"{RESULTS}/logs/ingest.log",
    shell:
        "{PYTHON} -m estbench.store --study {input.study:q} --store {output:q} 2> {log:q}"
