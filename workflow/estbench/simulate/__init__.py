"""Stage 1, simulate: seeding, estimator plug-ins and calling, data-generating
mechanisms, and the simulation job that writes shards. Imports only ``core``."""
