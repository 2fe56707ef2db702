"""Smoke test of the benchmark script: a tiny workload prints every stage with finite numbers.

No timing is asserted (speed targets live in ``benchmarks/``, never in tests); this only proves
that ``python -m benchmarks.run`` works end to end and its table is complete.
"""

from __future__ import annotations

import json
import math
import re

import pytest

from benchmarks.run import COLUMNS, main

pytestmark = pytest.mark.benchmark

#: Every row the table must have (prefixes; sizes and counts follow in brackets).
STAGES = [
    "generate scenario",
    "ingest (",
    "vintages",
    "daily ingest",
    "clean",
    "nowcast",
    "transmission",
    "R_t core",
    "forecast",
    "compartmental fits",
    "whole daily run",
    "scoring (",
]
#: Rows whose limit (bare-library time) and ours/limit ratio must be numbers.
WITH_LIMIT = ["ingest (", "vintages", "clean", "nowcast", "transmission", "R_t core", "scoring ("]


def _number(cell: str) -> float:
    """A table cell as a float ('1,234', '>=12', '3.1x', '1.2 M rows/s', '57 k regions/s')."""
    m = re.match(r"^(?:>=)?([0-9][0-9,]*(?:\.[0-9]+)?)\s*(M|k)?", cell.strip())
    assert m, f"not a number: {cell!r}"
    scale = {"M": 1e6, "k": 1e3, None: 1.0}[m.group(2)]
    return float(m.group(1).replace(",", "")) * scale


def test_quick_benchmark_prints_every_stage(tmp_path, capsys) -> None:
    code = main(["--quick", "--regions", "20", "--days", "120", "--snapshots", "20",
                 "--score-rows", "30000", "--out", str(tmp_path)])
    assert code == 0
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if ln.startswith("| ")]
    header = [c.strip() for c in lines[0].strip("|").split("|")]
    assert header == COLUMNS
    rows = {}
    for ln in lines[1:]:
        cells = [c.strip() for c in ln.strip().strip("|").split("|")]
        assert len(cells) == len(COLUMNS), ln
        rows[cells[0]] = dict(zip(COLUMNS, cells, strict=True))
    for prefix in STAGES:
        found = [name for name in rows if name.startswith(prefix)]
        assert found, f"no row for stage {prefix!r}; rows: {list(rows)}"
        row = rows[found[0]]
        # the simulator is not a pipeline stage: its Python peak is not traced
        cols = ("wall s", "cpu s", "RSS MB", "throughput") if prefix == "generate scenario" \
            else ("wall s", "cpu s", "py MB", "RSS MB", "throughput")
        for col in cols:
            value = _number(row[col])
            assert math.isfinite(value) and value >= 0, (prefix, col, row[col])
        if prefix in WITH_LIMIT:
            for col in ("limit s", "ours/limit"):
                value = _number(row[col])
                assert math.isfinite(value) and value >= 0, (prefix, col, row[col])
        if row["target"] != "—":
            assert row["met?"] in ("yes", "**no**"), row
    # the machine and versions are printed with the table, and the results are saved
    assert "cores" in out and "DuckDB" in out and "load average" in out
    saved = json.loads((tmp_path / "results.json").read_text())
    assert len(saved["rows"]) == len(rows)
    assert (tmp_path / "results.md").read_text().count("| ") >= len(rows)
