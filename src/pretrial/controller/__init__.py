"""Controllers: NEAT genomes compiled into batched numpy networks, and policy files (JSON with a content hash)."""
