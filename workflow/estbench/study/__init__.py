"""Stage 2, study: read and check the study file, the scenario grid and the jobs
the workflow runs. Imports ``core`` and ``simulate``."""
