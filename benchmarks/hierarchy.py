"""Region hierarchy measurement: is a parent's own forecast at least as good as the sum of its
children's medians?

``python -m benchmarks.hierarchy [--regions 8] [--runs 6] [--seeds N,...] [--reconcile
bottom_up|own|both]`` writes an invented
scenario with the simulator (``pipeline/simulate.write_scenario``), puts its districts under two
provinces and one nation (``[regions]`` with a parent column), ingests it and runs the full
pipeline (``pipeline.run.execute_run``) at ``--runs`` weekly as-of dates.  For every published
forecast of a parent (model × signal × target date × horizon) it compares, against the
scenario's true eventual counts (truth/final_counts.parquet, summed over the parent's leaves):

* the absolute error of the parent's own median vs that of the sum of its children's medians;
* the parent's WIS (Bracher et al. 2021, as ``models/scores.py`` computes it); the WIS of a
  point forecast (median only, no intervals) is its absolute error, so ``err_sum_children`` is
  also the WIS of the summed medians;
* the parent's tie-corrected 50 % / 90 % coverage (the scoring stage's ``cover_frac_50/90``).

``--reconcile`` sets ``reconcile_parents``: ``own`` (each parent's own fit to its aggregate
series, as before bottom-up reconciliation), ``bottom_up`` (the default: every model's parent
forecast built from its leaves', :mod:`tallywave.pipeline.reconcile`) or ``both`` (before →
after on the same scenarios).  Prints one row per model and level, and the overall ratio
|error parent| / |error sum of medians| (< 1 = the parent's forecast is better).  A
measurement, never asserted in tests.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from tallywave.models.scores import coverage_fraction, pit_bounds, weighted_interval_score
from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings
from tallywave.pipeline.simulate import write_scenario


def hierarchy_scenario(out: Path, n_regions: int, seed: int, n_days: int = 160
                       ) -> dict[str, str]:
    """Write the scenario plus a two-level tree: districts → Upper / Lower → Realm.

    Returns the parent of every region (districts and provinces)."""
    write_scenario(out, n_regions=n_regions, n_days=n_days, n_snapshots=70, window=35, seed=seed)
    reg = pd.read_csv(out / "regions.csv")
    half = len(reg) // 2
    tree = {d: ("Upper" if i < half else "Lower") for i, d in enumerate(reg["district"])}
    tree |= {"Upper": "Realm", "Lower": "Realm"}
    reg["province"] = reg["district"].map(tree)
    provinces = pd.DataFrame({"district": ["Upper", "Lower"], "province": ["Realm", "Realm"]})
    pd.concat([reg, provinces]).to_csv(out / "regions.csv", index=False)
    spec = (out / "feeds.toml").read_text()
    spec = spec.replace('columns = { region = "district", population = "population" }',
                        'columns = { region = "district", population = "population", '
                        'parent = "province" }')
    (out / "feeds.toml").write_text(spec)
    return tree


def leaves_of(tree: dict[str, str]) -> dict[str, list[str]]:
    """Every parent's leaf descendants."""
    parents = set(tree.values())
    out: dict[str, list[str]] = {}
    for leaf in (r for r in tree if r not in parents):
        node = tree.get(leaf)
        while node is not None:
            out.setdefault(node, []).append(leaf)
            node = tree.get(node)
    return out


def measure(n_regions: int = 8, runs: int = 6, seed: int = 20260302,
            models: list[str] | None = None, reconcile: str | None = None) -> pd.DataFrame:
    """Run the pipeline on the hierarchy scenario; one row per (model, parent, signal, target,
    horizon) with the parent's and the summed children's errors, the parent's WIS and
    coverage (``reconcile``: the ``reconcile_parents`` setting, default its default)."""
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        tree = hierarchy_scenario(out, n_regions, seed)
        leaves = leaves_of(tree)
        con = store.memory()
        ingest_spec(con, out / "feeds.toml")
        truth = pd.read_parquet(out / "truth" / "final_counts.parquet")
        last = dt.date.fromisoformat(json.loads(
            (out / "truth" / "scenario.json").read_text())["end"])
        settings = load_settings(None)
        lines = [f"models = {json.dumps(models)}"] if models else []
        lines += [f"reconcile_parents = {json.dumps(reconcile)}"] if reconcile else []
        if lines:
            (out / "s.toml").write_text("[defaults]\n" + "\n".join(lines) + "\n")
            settings = load_settings(out / "s.toml")
        dates = [last - dt.timedelta(days=28 + 7 * k) for k in range(runs)][::-1]
        run_ids = []
        for d in dates:
            run_ids.append(execute_run(con, d, settings, score_after=False)["run_id"])
        fc = con.execute(
            "SELECT model, region, signal, target_date, horizon_days, q_level, value "
            "FROM out.forecasts WHERE run_id IN (SELECT unnest(?::VARCHAR[]))",
            [run_ids]).df()
    truth["ref_date"] = pd.to_datetime(truth["ref_date"])
    fc["target_date"] = pd.to_datetime(fc["target_date"])
    rows = []
    tkey = truth.set_index(["region", "signal", "ref_date"])["value"]
    for (model, signal, target, h), g in fc.groupby(["model", "signal", "target_date",
                                                     "horizon_days"]):
        med = g[g["q_level"] == 0.5].set_index("region")["value"]
        for parent, kids in leaves.items():
            if parent not in med.index or not all(k in med.index for k in kids):
                continue
            try:
                y = float(sum(tkey[(k, signal, target)] for k in kids))
            except KeyError:
                continue
            q = g[g["region"] == parent].sort_values("q_level")
            levels, vals = q["q_level"].to_numpy(), q["value"].to_numpy()
            score = float(weighted_interval_score(np.asarray([y]), levels, vals[None, :]).wis[0])
            low, high = pit_bounds(np.asarray([y]), levels, vals[None, :], discrete=True)
            rows.append({"model": model, "parent": parent, "signal": signal,
                         "level": "nation" if parent == "Realm" else "province",
                         "horizon": int(h), "truth": y,
                         "err_parent": abs(float(med[parent]) - y),
                         "err_sum_children": abs(float(med[kids].sum()) - y),
                         "wis_parent": score,
                         "cover_50": float(coverage_fraction(low, high, 0.5)[0]),
                         "cover_90": float(coverage_fraction(low, high, 0.9)[0])})
    return pd.DataFrame(rows)


def summary(df: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Mean errors per group and the ratio parent / sum of children's medians."""
    g = df.groupby(by).agg(
        n=("truth", "size"), mae_parent=("err_parent", "mean"),
        mae_sum_children=("err_sum_children", "mean"), mean_wis_parent=("wis_parent", "mean"),
        cover_50=("cover_50", "mean"), cover_90=("cover_90", "mean"))
    g["ratio"] = g["mae_parent"] / g["mae_sum_children"]
    return g.round(3)


def compare(before: pd.DataFrame, after: pd.DataFrame, by: list[str]) -> pd.DataFrame:
    """Before → after per group: MAE ratio to the sum of leaves' medians, the parent's mean WIS
    and its coverage (the same forecasts of the leaves feed both)."""
    b, a = summary(before, by), summary(after, by)
    out = pd.DataFrame(index=b.index)
    out["ratio"] = b["ratio"].map("{:.2f}".format) + " → " + a["ratio"].map("{:.2f}".format)
    out["mean_wis"] = (b["mean_wis_parent"].map("{:.1f}".format) + " → "
                       + a["mean_wis_parent"].map("{:.1f}".format))
    out["wis_after/before"] = (a["mean_wis_parent"] / b["mean_wis_parent"]).round(2)
    out["cover_50"] = b["cover_50"].map("{:.2f}".format) + " → " + a["cover_50"].map("{:.2f}".format)
    out["cover_90"] = b["cover_90"].map("{:.2f}".format) + " → " + a["cover_90"].map("{:.2f}".format)
    return out


def main(argv: list[str] | None = None) -> int:
    """Print the measurement table."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--regions", type=int, default=8)
    ap.add_argument("--runs", type=int, default=6)
    ap.add_argument("--seeds", default="20260302", help="comma-separated scenario seeds")
    ap.add_argument("--reconcile", default="bottom_up", choices=("bottom_up", "own", "both"))
    ns = ap.parse_args(argv)
    t0 = time.perf_counter()
    seeds = [int(x) for x in ns.seeds.split(",")]
    pd.set_option("display.width", 160)
    if ns.reconcile == "both":
        before = pd.concat([measure(ns.regions, ns.runs, s, reconcile="own").assign(seed=s)
                            for s in seeds], ignore_index=True)
        after = pd.concat([measure(ns.regions, ns.runs, s, reconcile="bottom_up").assign(seed=s)
                           for s in seeds], ignore_index=True)
        for by in (["model", "level"], ["signal", "level"], ["horizon"]):
            print(compare(before, after, by).to_string(), end="\n\n")
        for name, df in (("own", before), ("bottom_up", after)):
            print(f"{name}: {len(df)} parent forecasts, |error| parent / sum of children's "
                  f"medians = {df['err_parent'].sum() / df['err_sum_children'].sum():.3f}, "
                  f"mean WIS {df['wis_parent'].mean():.2f}, coverage "
                  f"{df['cover_50'].mean():.2f} / {df['cover_90'].mean():.2f}")
        print(f"({time.perf_counter() - t0:.0f} s)")
        return 0
    df = pd.concat([measure(ns.regions, ns.runs, s, reconcile=ns.reconcile).assign(seed=s)
                    for s in seeds], ignore_index=True)
    print(summary(df, ["model", "level"]).to_string(), end="\n\n")
    print(summary(df, ["signal", "level"]).to_string(), end="\n\n")
    print(summary(df, ["horizon"]).to_string())
    tot = df["err_parent"].sum() / df["err_sum_children"].sum()
    print(f"\nall models and levels: {len(df)} parent forecasts, "
          f"|error| parent / sum of children's medians = {tot:.3f} "
          f"({time.perf_counter() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
