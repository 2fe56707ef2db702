"""Shared fixtures: one Prefect test server for the whole session, small demo scenarios."""

from __future__ import annotations

import os

import pytest

# Small matrix products are faster single-threaded (and our batches already run in parallel).
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")


@pytest.fixture(scope="session")
def prefect_server():
    """One ephemeral Prefect server for every test that runs a flow (it takes ~20 s to start)."""
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield
