"""Tallywave: daily surveillance counts to nowcasts, R_t, forecasts and forecast scores in DuckDB.

The project's folders install as one import namespace: ``tallywave.pipeline`` (one module per
stage), ``tallywave.models`` (mathematics only) and ``tallywave.flows`` (Prefect orchestration).
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("tallywave")
except PackageNotFoundError:  # pragma: no cover - running from an uninstalled checkout
    __version__ = "0+unknown"

__all__ = ["__version__"]
