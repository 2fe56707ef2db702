"""Write an invented outbreak scenario as daily published feed snapshots plus its ground truth.

Layout under ``out_dir`` (all paths relative):

* ``cases/cases_YYYY-MM-DD.csv``            ``district,date,total`` (cumulative reported cases)
* ``admissions/admissions_YYYY-MM-DD.csv``  ``district,date,admitted`` (daily counts)
* ``deaths/deaths_YYYY-MM-DD.jsonl``        JSON lines: district, date, deaths, published
* ``feeds.toml``                             feed spec with relative globs
* ``truth/infections.parquet``   region, date, infections, rt_true, onsets
* ``truth/final_counts.parquet`` region, signal, ref_date, value (eventual daily counts, clean)
* ``truth/delay_pmf.parquet``    signal, delay_days, prob (reporting delays)
* ``truth/artefacts.parquet``    region, signal, ref_date, kind, delta, detail
* ``truth/scenario.json``        parameters, seed, districts, populations, lags, generation interval

Snapshot k is published on as_of = start + n_days - n_snapshots + k.  The first snapshot holds the
whole history up to its as_of; later ones only the last ``window`` reference dates (cumulative
totals stay full totals).  File names carry the as_of date.  The maths lives in models/outbreak.py.
"""

from __future__ import annotations

import datetime as dt
import json
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from tallywave.models.outbreak import (
    SCENARIOS,
    OutbreakScenario,
    cumulative_vintage,
    reporting_scenario,
    simulate_outbreak,
    vintage,
)

__all__ = ["FEEDS_TOML", "SCENARIOS", "observations_frame", "write_scenario"]

FEEDS_TOML = """\
# Feed spec of the invented demo province (written by pipeline/simulate.py).
# Globs are relative to this file.

[source.district_cases]
path = "cases/*.csv"
format = "csv"
signal = "cases"
value_kind = "cumulative"
as_of = { from = "filename", pattern = "%Y-%m-%d" }
columns = { region = "district", ref_date = "date", value = "total" }

[source.district_admissions]
path = "admissions/*.csv"
format = "csv"
signal = "admissions"
value_kind = "daily"
as_of = { from = "filename", pattern = "%Y-%m-%d" }
columns = { region = "district", ref_date = "date", value = "admitted" }

[source.district_deaths]
path = "deaths/*.jsonl"
format = "jsonl"
signal = "deaths"
value_kind = "daily"
as_of = { from = "column", column = "published" }
columns = { region = "district", ref_date = "date", value = "deaths" }

# District sizes (the compartmental model needs each region's population).
[regions]
path = "regions.csv"
columns = { region = "district", population = "population" }
"""

_STR = np.dtypes.StringDType()
_TRUTH_FILES = ("infections.parquet", "final_counts.parquet", "delay_pmf.parquet",
                "artefacts.parquet", "scenario.json")
_FEED_GLOBS = ("cases/cases_*.csv", "admissions/admissions_*.csv", "deaths/deaths_*.jsonl")


def _clear_previous(out: Path) -> None:
    """Delete files an earlier run of this writer left (only its own name patterns)."""
    for pattern in _FEED_GLOBS:
        for f in out.glob(pattern):
            f.unlink()
    for name in _TRUTH_FILES:
        (out / "truth" / name).unlink(missing_ok=True)
    (out / "feeds.toml").unlink(missing_ok=True)
    (out / "regions.csv").unlink(missing_ok=True)


def _grid_text(prefix: np.ndarray, values: np.ndarray, suffix: str, keep: np.ndarray | None) -> str:
    """Join ``prefix + value + suffix`` over a (R, W) grid, row-major, optionally masked."""
    lines = np.strings.add(np.strings.add(prefix, values.astype(_STR)), suffix)
    flat = lines.ravel() if keep is None else lines[keep]
    return "".join(flat.tolist())


def _write(path: Path, text: str) -> int:
    """Write UTF-8 text with '\\n' line ends; return bytes written."""
    data = text.encode("utf-8")
    path.write_bytes(data)
    return len(data)


#: The committed demo set (``sample_feeds/``): 90 daily snapshots of 35-day windows keep it under
#: 5 MB while giving the demo's backfill enough vintages before its first as_of date.
DEMO_SNAPSHOTS = 90
DEMO_WINDOW = 35


def write_scenario(
    out_dir: str | Path,
    *,
    n_regions: int = 10,
    n_days: int = 200,
    n_snapshots: int = 60,
    window: int = 42,
    seed: int = 20260302,
    start: str | dt.date = "2026-03-02",
    scenario: str = "default",
) -> dict:
    """Simulate the invented province and write feed snapshots, feeds.toml and truth/ to out_dir.

    ``scenario`` names the reporting process (:data:`SCENARIOS`: drifting delays, weekend and
    holiday closures of reporting, long-tailed delays); the default is the demo's.  Earlier output
    of this writer in out_dir is replaced.  Returns a summary: files, rows, bytes.
    """
    t0 = time.perf_counter()
    start_date = dt.date.fromisoformat(str(start))
    out = Path(out_dir)
    for sub in ("cases", "admissions", "deaths", "truth"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    _clear_previous(out)

    reporting = reporting_scenario(scenario, n_days, start_date.weekday())
    sc = simulate_outbreak(n_regions=n_regions, n_days=n_days, n_snapshots=n_snapshots,
                           window=window, seed=seed, first_weekday=start_date.weekday(),
                           reporting=reporting)
    days = np.datetime64(start_date, "D") + np.arange(n_days)
    day_str = days.astype(str).astype(_STR)
    names = np.asarray(sc.names, dtype=_STR)
    comma_names = np.strings.add(names, ",")[:, None]
    json_names = np.strings.add(np.strings.add('{"district": "', names), '", "date": "')[:, None]

    cum = {sig: np.cumsum(tri, axis=2) for sig, tri in sc.published.items()}
    cases_final_cum = np.cumsum(sc.published["cases"].sum(axis=2), axis=1)
    miss = next(a for a in sc.artefacts if a["kind"] == "missing_day")

    files: list[str] = []
    rows = {"cases": 0, "admissions": 0, "deaths": 0}
    feed_bytes = 0
    first_asof = n_days - n_snapshots
    for k in range(n_snapshots):
        a = first_asof + k
        first = 0 if k == 0 else max(0, a - window + 1)
        asof = str(days[a])
        d_grid = day_str[first: a + 1][None, :]
        prefix = np.strings.add(np.strings.add(comma_names, d_grid), ",")

        keep = None
        if first <= miss["day"] <= a:
            keep = np.ones((n_regions, a + 1 - first), dtype=bool)
            keep[miss["region"], miss["day"] - first] = False
        totals = cumulative_vintage(cum["cases"], cases_final_cum, a, first)
        rel = f"cases/cases_{asof}.csv"
        feed_bytes += _write(out / rel, "district,date,total\n"
                             + _grid_text(prefix, totals, "\n", keep))
        rows["cases"] += totals.size - (0 if keep is None else 1)
        files.append(rel)

        admitted = vintage(cum["admissions"], a, first)
        rel = f"admissions/admissions_{asof}.csv"
        feed_bytes += _write(out / rel, "district,date,admitted\n"
                             + _grid_text(prefix, admitted, "\n", None))
        rows["admissions"] += admitted.size
        files.append(rel)

        deaths = vintage(cum["deaths"], a, first)
        jprefix = np.strings.add(np.strings.add(json_names, d_grid), '", "deaths": ')
        rel = f"deaths/deaths_{asof}.jsonl"
        feed_bytes += _write(out / rel, _grid_text(jprefix, deaths,
                                                   f', "published": "{asof}"}}\n', None))
        rows["deaths"] += deaths.size
        files.append(rel)

    feed_bytes += _write(out / "feeds.toml", FEEDS_TOML)
    files.append("feeds.toml")
    feed_bytes += _write(out / "regions.csv", "district,population\n" + "".join(
        f"{name},{int(pop)}\n" for name, pop in zip(sc.names, sc.populations, strict=True)))
    files.append("regions.csv")
    truth_rows = _write_truth(out / "truth", sc, days, start_date, scenario)
    files += [f"truth/{name}" for name in _TRUTH_FILES]
    rows.update(truth_rows)
    total_bytes = sum((out / f).stat().st_size for f in files)
    return {
        "out_dir": str(out),
        "files": files,
        "n_files": len(files),
        "rows": rows,
        "feed_bytes": feed_bytes,
        "bytes": total_bytes,
        "as_of_first": str(days[first_asof]),
        "as_of_last": str(days[-1]),
        "seconds": round(time.perf_counter() - t0, 3),
    }


def _write_truth(truth: Path, sc: OutbreakScenario, days: np.ndarray, start_date: dt.date,
                 scenario: str = "default") -> dict[str, int]:
    """Write the truth tables (Parquet) and scenario.json; return row counts."""
    n_regions, n_days = len(sc.names), len(days)
    region_col = np.repeat(np.asarray(sc.names, dtype=object), n_days)
    date_col = pa.array(np.tile(days, n_regions), type=pa.date32())
    path = sc.path
    pq.write_table(pa.table({
        "region": pa.array(region_col, type=pa.string()),
        "date": date_col,
        "infections": pa.array(path.infections.T.ravel(), type=pa.int64()),
        "rt_true": pa.array(path.rt.T.ravel(), type=pa.float64()),
        "onsets": pa.array(path.onsets.T.ravel(), type=pa.int64()),
    }), truth / "infections.parquet")

    signals = list(sc.triangles)
    pq.write_table(pa.table({
        "region": pa.array(np.tile(region_col, len(signals)), type=pa.string()),
        "signal": pa.array(np.repeat(np.asarray(signals, dtype=object), n_regions * n_days),
                           type=pa.string()),
        "ref_date": pa.array(np.tile(days, n_regions * len(signals)), type=pa.date32()),
        "value": pa.array(np.concatenate([sc.triangles[s].sum(axis=2).ravel() for s in signals]),
                          type=pa.int64()),
    }), truth / "final_counts.parquet")

    pmf_sig = [s for s, p in sc.delay_pmfs.items() for _ in p]
    pq.write_table(pa.table({
        "signal": pa.array(pmf_sig, type=pa.string()),
        "delay_days": pa.array([d for p in sc.delay_pmfs.values() for d in range(len(p))],
                               type=pa.int32()),
        "prob": pa.array(np.concatenate(list(sc.delay_pmfs.values())), type=pa.float64()),
    }), truth / "delay_pmf.parquet")

    art = sc.artefacts
    pq.write_table(pa.table({
        "region": pa.array([sc.names[a["region"]] for a in art], type=pa.string()),
        "signal": pa.array([a["signal"] for a in art], type=pa.string()),
        "ref_date": pa.array(days[[a["day"] for a in art]], type=pa.date32()),
        "kind": pa.array([a["kind"] for a in art], type=pa.string()),
        "delta": pa.array([a["delta"] for a in art], type=pa.int64()),
        "detail": pa.array([a["detail"] for a in art], type=pa.string()),
    }), truth / "artefacts.parquet")

    info: dict[str, object] = {
        "description": "Invented province 'Varethmoor' and an invented respiratory outbreak; "
                       "every name and number is fictional.",
        "start": start_date.isoformat(),
        "end": str(days[-1]),
        "seed": sc.parameters["seed"],
        **({} if scenario == "default" else {"scenario": scenario,
                                            "scenario_description": SCENARIOS[scenario]}),
        "parameters": sc.parameters,
        "districts": [{"name": nm, "population": int(p), "seeded_exposed": int(s)}
                      for nm, p, s in zip(sc.names, sc.populations, sc.seeds, strict=True)],
        "rt_definition": "R_t = beta_j(t) * S_j(t)/N_j * infectious_days (instantaneous, "
                         "receiving district, state at the start of day t)",
        "case_reference_date": "symptom onset; weekend shortfall moved to Monday",
        "seed_timing": "seeded_exposed enter E1 before day 0 and are not in infections",
        "reporting_delay_pmf": {s: p.tolist() for s, p in sc.delay_pmfs.items()},
        "clinical_lag_pmf": {s: p.tolist() for s, p in sc.clinical_pmfs.items()},
        "generation_interval_pmf": sc.generation_interval.tolist(),
        "artefacts": [{**a, "region": sc.names[a["region"]], "ref_date": str(days[a["day"]])}
                      for a in art],
    }
    (truth / "scenario.json").write_text(json.dumps(info, indent=2, sort_keys=True) + "\n",
                                         encoding="utf-8")
    return {"truth/infections": n_regions * n_days,
            "truth/final_counts": n_regions * n_days * len(signals),
            "truth/delay_pmf": len(pmf_sig), "truth/artefacts": len(art)}


def observations_frame(sc: OutbreakScenario, start: str | dt.date = "2026-03-02", *,
                       first_as_of: int = 0, last_as_of: int | None = None,
                       clean: bool = True) -> pd.DataFrame:
    """The ``core.observations`` rows a feed of the scenario would produce, built directly from
    its triangles (no files, no ingest): one row per (region, signal, ref_date) and as_of day on
    which the reported daily value changed, for as_of days ``first_as_of .. last_as_of``.

    Every reference date stays visible at every delay (no snapshot window), so reports however
    late reach the vintages.  ``clean`` uses the triangles without the injected artefacts.
    For trials of the nowcast against truth (``sc.triangles[signal].sum(axis=2)``).
    """
    day0 = np.datetime64(dt.date.fromisoformat(str(start)), "D")
    tris = sc.triangles if clean else sc.published
    frames = []
    for signal, tri in tris.items():
        n_r, n_t, k = tri.shape
        last = n_t - 1 if last_as_of is None else int(last_as_of)
        cum = np.cumsum(tri, axis=2)
        t = np.arange(n_t)[:, None]
        d = np.arange(k)[None, :]
        u = t + d  # report day of each cell
        # the first as_of sees every earlier reference date with its value known then
        first_cell = (u == np.maximum(t, first_as_of))
        changed = (tri != 0) | first_cell[None]
        keep = changed & ((u >= first_as_of) & (u <= last))[None]
        r_i, t_i, d_i = np.nonzero(keep)
        names = np.asarray(sc.names, dtype=object)
        frames.append(pd.DataFrame({
            "region": names[r_i], "signal": signal, "ref_date": day0 + t_i,
            "as_of": day0 + t_i + d_i, "value": cum[r_i, t_i, d_i].astype(float)}))
        old = np.arange(max(0, min(first_as_of - k + 1, n_t)))  # complete before first_as_of
        if old.size:
            r_o, t_o = np.meshgrid(np.arange(n_r), old, indexing="ij")
            frames.append(pd.DataFrame({
                "region": names[r_o.ravel()], "signal": signal, "ref_date": day0 + t_o.ravel(),
                "as_of": np.full(r_o.size, day0 + first_as_of),
                "value": cum[r_o.ravel(), t_o.ravel(), -1].astype(float)}))
    return pd.concat(frames, ignore_index=True)
