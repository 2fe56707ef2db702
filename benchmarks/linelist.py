"""Line-list benchmark: one file of 5 million records through ingest and the vintages step.

``python -m benchmarks.linelist [--records 5000000] [--regions 200] [--days 365] [--keep]``
writes an invented line list (CSV: id, site, onset, reported; reporting delays geometric with
mean 3 days; region names made up), then times, in a fresh DuckDB database:

* ``ingest`` — :func:`tallywave.pipeline.ingest.ingest_file` (parse, record spans, validation,
  duplicate-id check, insert into ``raw.reports``), with and without a ``record_id`` column;
* ``vintages`` — :func:`tallywave.pipeline.vintages.update_observations` (records → the count
  history in ``core.observations``);
* ``re-export`` — the same list exported again a day later with 1 % new records (complete list,
  no record id): ingest + vintages, and a check that nothing is double counted;
* the bare **limit**: DuckDB alone reading the same file and counting records per (site, onset,
  reported) — the irreducible part of the job.

Prints one row per step: wall and CPU seconds (all threads of this process; on a shared machine
CPU seconds move less with other jobs' load), records per second (wall), peak RSS growth, and
ours / limit in CPU seconds.
Speed is a measurement here, never asserted in tests.
"""

from __future__ import annotations

import argparse
import datetime as dt
import resource
import shutil
import tempfile
import textwrap
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_file, load_spec
from tallywave.pipeline.vintages import update_observations

START = np.datetime64("2026-01-01")


def write_list(path: Path, n: int, n_regions: int, n_days: int, seed: int,
               extra: float = 0.0) -> int:
    """Write an invented line list (optionally ``extra`` share of new records); rows written."""
    rng = np.random.default_rng(seed)
    m = n + int(n * extra)
    onset = rng.integers(0, n_days, m)
    delay = np.minimum(rng.geometric(1 / 3.0, m) - 1, 60)
    sites = np.char.add("Site-", np.arange(n_regions).astype(str))
    table = pa.table({
        "id": pa.array(np.char.add("r", np.arange(m).astype(str))),
        "site": pa.array(sites[rng.integers(0, n_regions, m)]),
        "onset": pa.array((START + onset).astype("datetime64[D]")),
        "reported": pa.array((START + onset + delay).astype("datetime64[D]")),
    })
    pacsv.write_csv(table, path)
    return m


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def limit_seconds(path: Path) -> tuple[float, float]:
    """DuckDB alone: read the CSV and count records per (site, onset, reported); (wall, CPU)."""
    con = duckdb.connect()
    t, c = time.perf_counter(), time.process_time()
    con.execute(f"CREATE TABLE x AS SELECT site, onset, reported, count(*) AS n "
                f"FROM read_csv('{path}') GROUP BY ALL").fetchall()
    out = (time.perf_counter() - t, time.process_time() - c)
    con.close()
    return out


def spec_file(folder: Path, record_id: bool) -> Path:
    """A line-list feed spec for the folder's CSV files."""
    cols = 'region = "site", ref_date = "onset", reported_on = "reported"'
    cols += ', record_id = "id"' if record_id else ""
    p = folder / ("spec_id.toml" if record_id else "spec.toml")
    p.write_text(textwrap.dedent(f"""\
        [source.lab{'_id' if record_id else ''}]
        path = "*.csv"
        format = "csv"
        signal = "tests"
        value_kind = "records"
        columns = {{ {cols} }}
        """))
    return p


def run(n: int, n_regions: int, n_days: int, keep: bool) -> list[tuple]:
    """Time every step; one tuple (step, wall s, CPU s, records, RSS growth MB, limit (wall,
    CPU) or None)."""
    folder = Path(tempfile.mkdtemp(prefix="tw-linelist-"))
    rows: list[tuple] = []
    try:
        f1 = folder / "export_1.csv"
        t = time.perf_counter()
        n1 = write_list(f1, n, n_regions, n_days, seed=1)
        print(f"wrote {n1:,} records, {f1.stat().st_size / 1e6:.0f} MB in "
              f"{time.perf_counter() - t:.1f} s")
        lim = limit_seconds(f1)
        for record_id in (False, True):
            spec = load_spec(spec_file(folder, record_id))[0]
            con = store.memory()
            r0, t, c = _rss_mb(), time.perf_counter(), time.process_time()
            out = ingest_file(con, spec, f1)
            rows.append((f"ingest{' (record_id)' if record_id else ''}",
                         time.perf_counter() - t, time.process_time() - c, out.rows_accepted,
                         _rss_mb() - r0, lim))
            assert out.status == "accepted", out.message
            r0, t, c = _rss_mb(), time.perf_counter(), time.process_time()
            update_observations(con)
            rows.append((f"vintages{' (record_id)' if record_id else ''}",
                         time.perf_counter() - t, time.process_time() - c, n1, _rss_mb() - r0,
                         None))
            total = con.execute("SELECT sum(v) FROM (SELECT arg_max(value, as_of) AS v FROM "
                                "core.observations GROUP BY region, signal, ref_date)"
                                ).fetchall()[0][0]
            assert int(total) == n1, (total, n1)
            if not record_id:
                f2 = folder / "export_2.csv"
                n2 = write_list(f2, n, n_regions, n_days, seed=1, extra=0.01)
                r0, t, c = _rss_mb(), time.perf_counter(), time.process_time()
                out = ingest_file(con, spec, f2)
                update_observations(con)
                rows.append(("re-export +1% (ingest + vintages)", time.perf_counter() - t,
                             time.process_time() - c, n2, _rss_mb() - r0, None))
                total = con.execute(
                    "SELECT sum(v) FROM (SELECT arg_max(value, as_of) AS v FROM "
                    "core.observations GROUP BY region, signal, ref_date)").fetchall()[0][0]
                assert int(total) == n2, (total, n2)  # the complete list, not n1 + n2
                f2.unlink()
            n_obs = con.execute("SELECT count(*) FROM core.observations").fetchall()[0][0]
            print(f"record_id={record_id}: core.observations holds {n_obs:,} rows")
            con.close()
    finally:
        if keep:
            print(f"kept {folder}")
        else:
            shutil.rmtree(folder, ignore_errors=True)
    return rows


def main(argv: list[str] | None = None) -> int:
    """Print the benchmark table."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--records", type=int, default=5_000_000)
    ap.add_argument("--regions", type=int, default=200)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--keep", action="store_true")
    ns = ap.parse_args(argv)
    print(f"{dt.datetime.now():%Y-%m-%d %H:%M}  duckdb {duckdb.__version__}")
    rows = run(ns.records, ns.regions, ns.days, ns.keep)
    print(f"\n{'step':<36}{'wall s':>8}{'CPU s':>8}{'records/s':>12}{'RSS +MB':>9}"
          f"{'limit wall/CPU':>16}{'ours/limit CPU':>16}")
    for step, sec, cpu, n, rss, lim in rows:
        lim_s = f"{lim[0]:.1f} / {lim[1]:.1f}" if lim else ""
        ratio = f"{cpu / lim[1]:.1f}" if lim else ""
        print(f"{step:<36}{sec:>8.1f}{cpu:>8.1f}{n / sec:>12,.0f}{rss:>9.0f}{lim_s:>16}"
              f"{ratio:>16}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
