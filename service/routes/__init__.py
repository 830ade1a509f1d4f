"""HTTP routes, one module per resource: ops (health, metrics), models, jobs, trainings."""
