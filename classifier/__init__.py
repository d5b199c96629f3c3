"""Decisions and side effects: manifests, training, scoring, the store, the CLI."""
