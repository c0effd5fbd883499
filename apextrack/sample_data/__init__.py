"""Bundled demo stacks (package data); see sample_stacks/README.md."""
