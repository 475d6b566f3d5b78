"""Ingest rule: load new or changed shards into the store and recompute measures.

Its inputs are the job records; the shards are those the study names."""
import json
from pathlib import Path

from estbench.jobs import shard_paths
from estbench.precision import with_allocation
from estbench.store import ingest
from estbench.study import study_from_mapping

study = with_allocation(study_from_mapping(snakemake.config, source=Path(snakemake.input.study)))  # noqa: F821
summary = ingest(snakemake.output[0], study, shard_paths(study))
Path(snakemake.log[0]).write_text(json.dumps(summary) + "\n")  # noqa: F821
