"""Stage 5, app: the ``estbench`` command, the workflow runner, status, the
until-precise loop and project scaffolding."""
