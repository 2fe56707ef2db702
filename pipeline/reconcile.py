"""Parents' forecasts from their leaves (region hierarchies) → ``out.forecasts``, ``out.fits``.

A parent region (``core.regions.n_children > 0``) carries the sum of its leaf regions' series
(:mod:`tallywave.pipeline.hierarchy`).  One model fitted to that sum misses what the per-leaf
fits see when the leaves are at different phases (measured with ``benchmarks/hierarchy.py``:
the parent's own median was up to 1.76× as far from the truth as the sum of its leaves'
medians).  With ``reconcile_parents = "bottom_up"`` (default) every model's published forecast
of a parent is therefore built from the same model's forecasts of the parent's leaves, in report
units (:func:`tallywave.models.reconcile.bottom_up_quantiles`: the median is the sum of the
leaves' medians; the spread assumes a pairwise error correlation ``reconcile_correlation``
between leaves).  If any leaf lacks a forecast of that model the parent keeps its own, and says
so.  One ``out.fits`` row per parent × signal (model ``reconciled``) records what was published.

The parents' own fits still run (they are the fallback), but nothing pooled over the regions of
a signal in the forecast stage counts a parent: its data are its leaves' data (:func:`leaf_mask`).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.reconcile import bottom_up_matrix
from tallywave.pipeline.settings import Settings

#: ``out.fits.model`` of the rows that say how a parent's forecasts were published.
FITS_MODEL = "reconciled"


def parent_leaves(con: duckdb.DuckDBPyConnection) -> dict[str, list[str]]:
    """Every parent region's leaf descendants (empty without a hierarchy)."""
    rows = con.execute("SELECT region, parent, coalesce(n_children, 0) FROM core.regions"
                       ).fetchall()
    parent = {str(r): (None if p is None else str(p)) for r, p, _ in rows}
    is_parent = {str(r) for r, _, n in rows if n > 0}
    out: dict[str, list[str]] = {}
    for leaf in sorted(r for r in parent if r not in is_parent):
        node, seen = parent.get(leaf), {leaf}
        while node is not None and node not in seen:  # the tree is checked at ingest
            out.setdefault(node, []).append(leaf)
            seen.add(node)
            node = parent.get(node)
    return out


def leaf_mask(con: duckdb.DuckDBPyConnection, regions: np.ndarray) -> np.ndarray:
    """True for the regions that are not parents: the ones anything pooled may count."""
    parents = set(parent_leaves(con))
    return np.array([str(r) not in parents for r in regions], dtype=bool)


@dataclass
class Reconciler:
    """Replaces the parents' rows of each model's forecast by the bottom-up sum of their leaves'
    rows and keeps a note per parent × signal for ``out.fits``."""

    con: duckdb.DuckDBPyConnection
    settings: Settings
    tree: dict[str, list[str]] = field(init=False)
    notes: dict[tuple[str, str], dict] = field(init=False, default_factory=dict)

    def __post_init__(self) -> None:
        self.tree = parent_leaves(self.con)

    def apply(self, signal: str, regions: np.ndarray, model: str, q: np.ndarray) -> np.ndarray:
        """``q`` (n_regions, H, k) in report units, rows aligned with ``regions``; returns it
        with every parent's rows reconciled (a copy; unchanged without parents)."""
        if not self.tree:
            return q
        pos = {str(r): i for i, r in enumerate(regions)}
        parents = [(p, pos[p], [pos[c] for c in kids if c in pos])
                   for p, kids in self.tree.items() if p in pos]
        parents = [x for x in parents if x[2]]
        if not parents:
            return q
        how = str(self.settings.get("reconcile_parents", signal))
        rho = float(self.settings.get("reconcile_correlation", signal))
        levels = list(self.settings.for_signal(signal)["quantiles"])
        out = q.copy()
        summed = bottom_up_matrix(q, [rows for _, _, rows in parents], levels, rho) \
            if how == "bottom_up" else None
        for j, (name, row, rows) in enumerate(parents):
            note = self.notes.setdefault((name, signal), {
                "method": how, "correlation": rho, "leaves": len(rows), "bottom_up": [],
                "own": []})
            if summed is not None and np.isfinite(q[rows]).all() and len(rows):
                out[row] = summed[j]
                note["bottom_up"].append(model)
            else:
                note["own"].append(model)
        return out

    def fits_frame(self, run_id: str) -> pd.DataFrame:
        """One ``out.fits`` row per parent × signal saying which forecasts are bottom-up."""
        rows = []
        for (region, signal), n in sorted(self.notes.items()):
            up, own = n["bottom_up"], n["own"]
            if n["method"] == "bottom_up":
                msg = (f"bottom-up from {n['leaves']} leaf regions (pairwise error correlation "
                       f"{n['correlation']:g}): {', '.join(up) or 'none'}")
                if own:
                    msg += f"; own forecast (a leaf has none): {', '.join(own)}"
            else:
                msg = "own forecasts of the aggregate series (reconcile_parents = own)"
            rows.append((run_id, region, FITS_MODEL, json.dumps(n), None,
                         n["method"] != "bottom_up" or not own, msg, signal))
        return pd.DataFrame(rows, columns=["run_id", "region", "model", "params_json",
                                           "objective", "converged", "message", "signal"])
