"""The results folder: schema, writing and reading, manifest, data dictionary, checkpoints, size estimate."""
