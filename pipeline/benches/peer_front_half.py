"""A peer for the front-half benchmark: a short Python script doing a subset of plotsieve's
ingest + clean + plots on the same simulated exports, timed beside plotsieve.

What it does (and what it leaves out, so its time is a floor for that work in Python, not a
like-for-like result): polars reads every export; the flow is shifted by the fixed fallback
delay (no delay estimate); pass ends, speed, swath and moisture bounds as fixed rules; yield
at standard moisture; one MAD outlier rule over the whole harvest (plotsieve's rules work per
pass and neighbourhood); a shapely STRtree point-in-polygon join in longitude/latitude (no
projection, no headland buffer, no coverage); plot means. No rejection log, no summary, no
files written.

Run by `cargo bench -p plotsieve --bench ingest_clean`, which installs polars, shapely and
numpy into a venv of its own (target/peer-venv) and prints this script's time and the ratio.
Alone: `python3 peer_front_half.py HARVEST_FOLDER` (the folder `plotsieve simulate` makes);
prints `seconds points kept plots` on one line.
"""

import json
import sys
import time
from pathlib import Path

import numpy as np
import polars as pl
import shapely

# Unit factors: lb/s -> kg/s, mph -> m/s, ft -> m (exact definitions).
LB_KG, MPH_MS, FT_M = 0.45359237, 0.44704, 0.3048
FLOW_DELAY_S = 11.0  # the trial file's fallback flow delay
END_S = 4  # records dropped at each end of a pass (common practice, no source)
SPEED = (0.5, 4.0)  # m/s
SWATH_MIN_M = 4.0
MOISTURE = (8.0, 40.0)  # percent
STANDARD_MOISTURE = 15.5  # corn, percent (USDA market standard)
MAD_K = 3.5


def one_export(path: Path) -> pl.DataFrame:
    df = pl.read_csv(path)
    shift = int(round(FLOW_DELAY_S))  # records logged every second
    df = df.with_columns(
        pl.col("mass_flow_lb_s").shift(-shift).alias("flow"),
        (pl.col("speed_mph") * MPH_MS).alias("speed"),
        (pl.col("swath_ft") * FT_M).alias("swath"),
        # A pass: a run of records with the header down.
        (pl.col("header_state") != pl.col("header_state").shift(1))
        .fill_null(True)
        .cum_sum()
        .alias("pass_id"),
    )
    df = df.with_columns(
        pl.int_range(pl.len()).over("pass_id").alias("k"),
        pl.len().over("pass_id").alias("pass_len"),
    )
    df = df.filter(
        (pl.col("header_state") == 1)
        & (pl.col("k") >= END_S)
        & (pl.col("k") < pl.col("pass_len") - END_S)
        & pl.col("speed").is_between(*SPEED)
        & (pl.col("swath") >= SWATH_MIN_M)
        & pl.col("moisture_pct").is_between(*MOISTURE)
        & pl.col("flow").is_not_null()
    )
    # kg/ha at standard moisture: flow / (speed x swath), 1 s per record.
    wet = pl.col("flow") * LB_KG / (pl.col("speed") * pl.col("swath")) * 10_000.0
    return df.select(
        "lon_deg",
        "lat_deg",
        (wet * (100.0 - pl.col("moisture_pct")) / (100.0 - STANDARD_MOISTURE)).alias("y"),
    )


def main(folder: Path) -> None:
    t0 = time.perf_counter()
    exports = sorted((folder / "monitor").glob("*.csv"))
    pts = pl.concat([one_export(p) for p in exports])
    n_read = sum(1 for _ in exports)
    y = pts["y"].to_numpy()
    med = np.median(y)
    mad = 1.4826 * np.median(np.abs(y - med))
    pts = pts.filter((pl.col("y") - med).abs() <= MAD_K * mad)
    with open(folder / "plots.geojson") as f:
        features = json.load(f)["features"]
    polys = [shapely.Polygon(ft["geometry"]["coordinates"][0]) for ft in features]
    ids = np.array([ft["properties"]["plot_id"] for ft in features])
    tree = shapely.STRtree(polys)
    points = shapely.points(pts["lon_deg"].to_numpy(), pts["lat_deg"].to_numpy())
    pi, gi = tree.query(points, predicate="within")
    joined = pl.DataFrame({"plot_id": ids[gi], "y": pts["y"].to_numpy()[pi]})
    means = joined.group_by("plot_id").agg(pl.col("y").mean())
    seconds = time.perf_counter() - t0
    print(f"{seconds:.3f} {len(pts)} {len(joined)} {len(means)} ({n_read} exports)")


if __name__ == "__main__":
    main(Path(sys.argv[1]))
