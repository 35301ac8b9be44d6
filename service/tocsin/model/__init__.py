"""Validated data models: site registry, hit batches, candidates, configuration."""
