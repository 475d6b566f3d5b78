# The single writer of the store. update(): a failed ingest restores the previous store.
rule ingest:
    input:
        jobs=JOB_RECORDS,
        study=STUDY_FILE,
    output:
        update(STORE),
    log:
        f"{RESULTS}/logs/ingest.log",
    script:
        "../scripts/ingest.py"
