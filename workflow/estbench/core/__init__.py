"""Stage 0, shared by every stage: errors and exit codes, the results layout,
atomic writes, hashing, and the files bundled with the package."""
