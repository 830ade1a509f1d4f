"""geotween's serving side: registry, API, jobs, client, CLI."""
