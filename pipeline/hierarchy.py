"""Regions and their hierarchy: the ``[regions]`` table of a feed spec → ``core.regions``, and the
aggregate series of every parent region in ``core.observations``.

``[regions] path = "regions.csv", columns = { region = "...", population = "...",
parent = "..." }`` (population and parent optional, at least one of them).  With a ``parent``
column the regions form a tree (district → province → nation): ``core.regions`` gets each
region's ``parent``, its ``level`` (0 = top) and ``n_children``; a parent named only in the
parent column is added.  A parent's series is the sum of its leaf descendants' series, derived in
the vintages step (a pure transform), so every later stage treats it as one more region.  A
parent's own feed rows are not used (its aggregate replaces them); its population is the sum of
its leaves' populations when all are known.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

from tallywave.pipeline.errors import UserError
from tallywave.pipeline.feedspec import read_toml
from tallywave.pipeline.store import transaction

_KEYS = {"path", "columns"}
_COLUMNS = {"region", "population", "parent"}


@dataclass
class RegionsResult:
    """What loading ``[regions]`` did: a one-line message and whether the tree changed."""

    message: str
    tree_changed: bool


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _lit(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def _spec_table(p: Path) -> tuple[Path, dict[str, str]] | None:
    """The validated ``[regions]`` table: (regions file, column map) or None."""
    t = read_toml(p).get("regions")
    if t is None:
        return None
    where = f"{p}: [regions]"
    if not isinstance(t, dict):
        raise UserError(f"{where} must be a table")
    if set(t) - _KEYS:
        raise UserError(f"{where}: unknown key '{min(set(t) - _KEYS)}' (path, columns)")
    if not isinstance(t.get("path"), str) or not t["path"].strip():
        raise UserError(f"{where}: needs path = \"regions.csv\"")
    cols = t.get("columns", {"region": "region", "population": "population"})
    if not isinstance(cols, dict) or "region" not in cols or set(cols) - _COLUMNS \
            or len(cols) < 2:
        bad = min(set(cols) - _COLUMNS) if isinstance(cols, dict) and set(cols) - _COLUMNS \
            else None
        raise UserError(f"{where}: columns must map region and population and/or parent"
                        + (f" (unknown '{bad}')" if bad else ""))
    for k, v in cols.items():
        if not isinstance(v, str) or not v.strip():
            raise UserError(f"{where}: columns.{k} must be a column name (text), got {v!r}")
    path = Path(t["path"]) if os.path.isabs(t["path"]) else p.parent / t["path"]
    if not path.is_file():
        raise UserError(f"{where}: {path} not found")
    return path, {k: str(v) for k, v in cols.items()}


def _read(con: duckdb.DuckDBPyConnection, path: Path, cols: dict[str, str]) -> pd.DataFrame:
    src = f"read_csv({_lit(str(path))}, all_varchar = true)"
    try:
        names = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {src}").fetchall()]
        missing = [c for c in cols.values() if c not in names]
        if missing:
            raise UserError(f"{path}: missing column(s) {', '.join(missing)}")
        pop = (f"TRY_CAST({_q(cols['population'])} AS DOUBLE)" if "population" in cols
               else "NULL::DOUBLE")
        parent = (f"nullif(trim({_q(cols['parent'])}), '')" if "parent" in cols
                  else "NULL::VARCHAR")
        return con.execute(
            f"SELECT nullif(trim({_q(cols['region'])}), '') AS region, {pop} AS population, "
            f"{parent} AS parent FROM {src}").df()
    except duckdb.Error as exc:
        raise UserError(f"{path}: cannot parse ({str(exc).splitlines()[0][:160]})") from exc


def tree_levels(parent: dict[str, str | None], source: str) -> dict[str, int]:
    """Depth of every region below the top of its tree (0 = no parent); a cycle is refused."""
    level: dict[str, int] = {}
    for start in parent:
        path: list[str] = []
        node: str | None = start
        while node is not None and node not in level:
            if node in path:
                loop = " → ".join(path[path.index(node):] + [node])
                raise UserError(f"{source}: the region hierarchy has a cycle ({loop})")
            path.append(node)
            node = parent.get(node)
        base = -1 if node is None else level[node]
        for i, n in enumerate(reversed(path)):
            level[n] = base + 1 + i
    return level


def load_regions(con: duckdb.DuckDBPyConnection, spec_path: str | Path) -> RegionsResult | None:
    """Load the optional ``[regions]`` table into ``core.regions`` (one transaction).

    Without a parent column: rows with a missing region or a population that is not a positive
    number are skipped and counted; the rest replace earlier sizes (parents are kept).  With a
    parent column: every row with a region is kept (an unusable population becomes unknown),
    its parent replaces the earlier one, and the whole tree is checked (no cycles).
    """
    found = _spec_table(Path(spec_path))
    if found is None:
        return None
    path, cols = found
    df = _read(con, path, cols)
    has_parent = "parent" in cols
    good_pop = (df["population"] > 0) & np.isfinite(df["population"])
    keep = df["region"].notna() & (good_pop | has_parent | ("population" not in cols))
    bad = int((~keep).sum()) + int((keep & ~good_pop & df["population"].notna()).sum())
    df = df[keep].drop_duplicates("region", keep="last").copy()
    df.loc[~((df["population"] > 0) & np.isfinite(df["population"])), "population"] = np.nan
    self_parent = df[df["parent"] == df["region"]]
    if len(self_parent):
        raise UserError(f"{spec_path}: [regions] {path}: region "
                        f"'{self_parent['region'].iloc[0]}' is its own parent")

    old = con.execute("SELECT region, population, parent FROM core.regions").df()
    merged = old.set_index("region")
    new = df.set_index("region")
    if "population" in cols:
        merged = merged.drop(index=[r for r in new.index if r in merged.index])
        base = new if has_parent else new.assign(
            parent=old.set_index("region")["parent"].reindex(new.index))
        merged = pd.concat([merged, base])
    else:  # only the tree: populations stay as they were
        pops = merged["population"].reindex(new.index)
        merged = pd.concat([merged.drop(index=[r for r in new.index if r in merged.index]),
                            new.assign(population=pops)])
    implicit = sorted(set(merged["parent"].dropna()) - set(merged.index))
    merged = pd.concat([merged, pd.DataFrame({"population": np.nan, "parent": None},
                                             index=pd.Index(implicit, name="region"))])
    parent = {str(r): (None if pd.isna(p) else str(p)) for r, p in merged["parent"].items()}
    level = tree_levels(parent, f"{spec_path}: [regions] {path}")
    children = pd.Series([p for p in parent.values() if p is not None]).value_counts()
    out = pd.DataFrame({"region": list(parent), "parent": list(parent.values())})
    out["level"] = out["region"].map(level).astype("int32")
    out["n_children"] = out["region"].map(children).fillna(0).astype("int32")
    out["population"] = merged["population"].reindex(out["region"]).to_numpy(dtype=float)
    out["population"] = _parent_populations(out)
    changed = _tree(old) != {r: p for r, p in parent.items() if p is not None}
    with transaction(con):
        con.register("_regions", out)
        con.execute("DELETE FROM core.regions")
        con.execute("INSERT INTO core.regions (region, population, file_id, parent, level, "
                    "n_children) SELECT region, population, NULL, parent, level, n_children "
                    "FROM _regions")
        con.unregister("_regions")
    n_parents = int((out["n_children"] > 0).sum())
    msg = (f"{path}: {len(df)} regions, {n_parents} parent(s) in "
           f"{int(out['level'].max()) + 1} levels" if n_parents
           else f"{path}: {len(df)} region sizes")
    return RegionsResult(msg + (f", {bad} rows skipped or without a usable population"
                                if bad else ""), changed)


def _tree(df: pd.DataFrame) -> dict[str, str]:
    return {str(r): str(p) for r, p in zip(df["region"], df["parent"], strict=True)
            if p is not None and not pd.isna(p)}


def _parent_populations(regions: pd.DataFrame) -> np.ndarray:
    """Populations with every parent's replaced by the sum of its leaves' (NaN if any unknown)."""
    pop = dict(zip(regions["region"], regions["population"], strict=True))
    kids: dict[str, list[str]] = {}
    for r, p in zip(regions["region"], regions["parent"], strict=True):
        if p is not None:
            kids.setdefault(p, []).append(r)

    def total(r: str) -> float:
        if r not in kids:
            return float(pop[r])
        return float(sum(total(c) for c in kids[r]))  # NaN propagates: any unknown leaf

    return np.asarray([total(r) for r in regions["region"]], dtype=float)


#: Every (leaf, ancestor) pair of the tree in core.regions.
ANCESTORS = """WITH RECURSIVE anc(region, ancestor) AS (
    SELECT region, parent FROM core.regions WHERE parent IS NOT NULL
    UNION ALL
    SELECT a.region, r.parent FROM anc a JOIN core.regions r ON r.region = a.ancestor
    WHERE r.parent IS NOT NULL
)"""

#: Vintage rows of every parent: the sum over its leaves of each leaf's value, as known at each
#: as_of (leaf values become increments over their previous vintage, the increments are summed
#: per ancestor and accumulated back; a row only where the sum changed).
_AGGREGATE = ANCESTORS + """,
leaf AS (
    SELECT o.region, o.signal, o.ref_date, o.as_of, o.file_id,
           o.value - coalesce(lag(o.value) OVER (PARTITION BY o.region, o.signal, o.ref_date
                                                 ORDER BY o.as_of, o.file_id), 0) AS delta
    FROM core.observations o
    WHERE o.signal IN (SELECT signal FROM _affected)
      AND o.region IN (SELECT region FROM anc)
      AND o.region NOT IN (SELECT region FROM core.regions WHERE n_children > 0)
),
agg AS (
    SELECT a.ancestor AS region, l.signal, l.ref_date, l.as_of, sum(l.delta) AS delta,
           max(l.file_id) AS file_id
    FROM leaf l JOIN anc a USING (region)
    GROUP BY a.ancestor, l.signal, l.ref_date, l.as_of
),
acc AS (
    SELECT region, signal, ref_date, as_of, file_id,
           sum(delta) OVER (PARTITION BY region, signal, ref_date ORDER BY as_of
                            ROWS UNBOUNDED PRECEDING) AS value
    FROM agg
)
SELECT region, signal, ref_date, as_of, value, file_id FROM acc
QUALIFY value IS DISTINCT FROM lag(value) OVER (PARTITION BY region, signal, ref_date
                                                ORDER BY as_of)
"""


def has_tree(con: duckdb.DuckDBPyConnection) -> bool:
    """True when core.regions names at least one parent."""
    return bool(con.execute("SELECT count(*) FROM core.regions WHERE n_children > 0"
                            ).fetchall()[0][0])


def aggregate_parents(con: duckdb.DuckDBPyConnection) -> int:
    """Replace the rows of every parent region for the signals in ``_affected`` by the sums of
    their leaves (inside the caller's transaction); returns the rows written."""
    con.execute("DELETE FROM core.observations WHERE signal IN (SELECT signal FROM _affected) "
                "AND region IN (SELECT region FROM core.regions WHERE n_children > 0)")
    if not has_tree(con):
        return 0
    before = con.execute("SELECT count(*) FROM core.observations").fetchall()[0][0]
    con.execute("INSERT INTO core.observations (region, signal, ref_date, as_of, value, file_id) "
                + _AGGREGATE)
    return int(con.execute("SELECT count(*) FROM core.observations").fetchall()[0][0] - before)
