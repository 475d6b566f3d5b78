# The single writer of the store. update(): a failed ingest restores the previous store.
rule ingest:
    input:
        shards=ALL_SHARDS,
        study=STUDY_FILE,
    output:
        update(STORE),
    log:
        f"{RESULTS}/logs/ingest.log",
    script:
        "../scripts/ingest.py"
