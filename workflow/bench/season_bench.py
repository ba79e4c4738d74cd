"""Benchmark: a simulated season on Snakemake with 1 and 2 parallel trial jobs.

    python workflow/bench/season_bench.py --plotsieve BIN --snakemake VENV/bin/snakemake \
        --work /tmp/season-bench

Simulates TRIALS trials (default 50, each 16 fields x 33 blocks, about 201,000 records:
10 M in all; kept in --work between calls), then runs workflow/Snakefile on them twice from
nothing: one job at a time with 2 threads, and two jobs at a time with 1 thread each.
Prints the wall time of each, every job's time and peak memory (Snakemake's benchmark
table: max_rss), the season fit's, and the season fit on the first half of the trials, for
the README. Snakemake is installed by the caller (a venv), never by the tests.
"""

import argparse
import csv
import os
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

SNAKEFILE = Path(__file__).resolve().parents[1] / "Snakefile"


def sh(cmd, cwd):
    p = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    if p.returncode != 0:
        sys.exit(f"failed: {' '.join(map(str, cmd))}\n{p.stdout[-3000:]}\n{p.stderr[-3000:]}")
    return p


def season_file(n, out="season-run"):
    return f'[season]\nname = "Benchmark season"\nout = "{out}"\n' + "".join(
        f'\n[[trial]]\nfile = "trials/t{i:03d}/trial.toml"\nout = "runs/t{i:03d}"\n'
        for i in range(n)
    )


def simulate(args, work):
    stamp = work / "simulated.txt"
    want = f"{args.trials} {args.fields} {args.blocks}\n"
    if stamp.exists() and stamp.read_text() == want:
        return
    shutil.rmtree(work / "trials", ignore_errors=True)
    for i in range(args.trials):
        # Trials spread over the map like a company's sites (0.5 degree apart).
        sh(
            [
                args.plotsieve, "simulate", f"trials/t{i:03d}", "--seed", str(1000 + i),
                "--fields", str(args.fields), "--blocks", str(args.blocks),
                "--origin-lon", f"{-99.0 + 0.5 * (i % 10):.1f}",
                "--origin-lat", f"{39.0 + 0.5 * (i // 10):.1f}", "--quiet",
            ],
            work,
        )
    stamp.write_text(want)


def bench_rows(work):
    rows = {}
    for p in sorted((work / "workflow-logs" / "bench").rglob("*.tsv")):
        with open(p) as f:
            r = next(csv.DictReader(f, delimiter="\t"))
        rows[str(p.relative_to(work / "workflow-logs" / "bench"))] = (
            float(r["s"]),
            float(r["max_rss"]),
        )
    return rows


def run_workflow(args, work, jobs):
    for d in ["runs", "season-run", "workflow-state", "workflow-logs", ".snakemake"]:
        shutil.rmtree(work / d, ignore_errors=True)
    threads = 2 // jobs
    t0 = time.perf_counter()
    sh(
        [
            args.snakemake, "-s", SNAKEFILE, "--config", "season=season.toml",
            f"plotsieve={args.plotsieve}", f"threads={threads}", "--cores", "2", "--quiet",
        ],
        work,
    )
    wall = time.perf_counter() - t0
    rows = bench_rows(work)
    season = rows.pop("season.tsv")
    secs = [r[0] for r in rows.values()]
    rss = [r[1] for r in rows.values()]
    return wall, secs, rss, season


def main():
    a = argparse.ArgumentParser()
    a.add_argument("--plotsieve", required=True)
    a.add_argument("--snakemake", required=True)
    a.add_argument("--work", required=True)
    a.add_argument("--trials", type=int, default=50)
    a.add_argument("--fields", type=int, default=16)
    a.add_argument("--blocks", type=int, default=33)
    args = a.parse_args()
    args.plotsieve = os.path.abspath(args.plotsieve)
    args.snakemake = os.path.abspath(args.snakemake)
    work = Path(args.work).resolve()
    work.mkdir(parents=True, exist_ok=True)
    simulate(args, work)
    (work / "season.toml").write_text(season_file(args.trials))
    points, mb = 0, 0.0
    for i in range(args.trials):
        for f in (work / "trials" / f"t{i:03d}" / "monitor").iterdir():
            points += sum(1 for _ in open(f)) - 1
            mb += f.stat().st_size / 1e6
    print(f"season: {args.trials} trials x {args.fields} fields, {points:,} records, {mb:.0f} MB of exports")
    print("| parallel jobs x threads | wall (s) | trial job (s): median, max | trial job peak memory (MB): median, max | season fit (s), its peak memory (MB) |")
    print("|---|---:|---:|---:|---:|")
    for jobs in (1, 2):
        wall, secs, rss, season = run_workflow(args, work, jobs)
        print(
            f"| {jobs} x {2 // jobs} | {wall:.1f} | {statistics.median(secs):.2f}, {max(secs):.2f} "
            f"| {statistics.median(rss):.0f}, {max(rss):.0f} | {season[0]:.2f}, {season[1]:.0f} |"
        )
    per_trial_mb = mb / args.trials
    print(f"per trial: {points / args.trials:,.0f} records, {per_trial_mb:.1f} MB of exports; "
          f"peak memory {max(rss) / (points / args.trials / 1e6):.0f} MB per million records")
    # The season fit's growth with the number of trials: the first half alone.
    half = args.trials // 2
    (work / "half.toml").write_text(season_file(half, "half-run"))
    t0 = time.perf_counter()
    sh([args.plotsieve, "season", "half.toml", "--quiet"], work)
    print(f"season fit of the first {half} trials alone: {time.perf_counter() - t0:.2f} s")


if __name__ == "__main__":
    main()
