"""Prefect orchestration: thin flows and tasks over the ``pipeline`` stages."""
