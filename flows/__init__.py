"""Prefect orchestration: thin flows and tasks over the ``tallywave.pipeline`` stages."""
