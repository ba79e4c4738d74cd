"""The season workflow (workflow/Snakefile) against plotsieve run by hand.

Run by CI with Snakemake installed from PyPI in a venv:

    python workflow/tests/check_workflow.py --plotsieve BIN --snakemake VENV/bin/snakemake

On a season of three simulated trials it checks that
1. the workflow's run folders and season tables are byte-identical to `plotsieve run` per
   trial and `plotsieve season` by hand;
2. after one export changes, the engine's dry run lists that trial and the season only;
3. a trial whose run fails stops the season, reported with the trial and the stage, and no
   season folder is left; with `allow_failed_trials = true` the season is fitted without it
   and its warnings name the trial and the stage;
4. the run-folder lock holds under the engine: a trial job whose run folder another process
   holds is refused naming the holder, and runs once it is released.
Every check raises on failure; the script exits non-zero.
"""

import argparse
import fcntl
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
SNAKEFILE = REPO / "workflow" / "Snakefile"
SEEDS = (21, 22, 23)


def run(cmd, cwd, ok=True):
    p = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    if ok and p.returncode != 0:
        raise SystemExit(
            f"failed ({p.returncode}): {' '.join(map(str, cmd))}\n{p.stdout}\n{p.stderr}"
        )
    return p


def season_text(allow=False):
    head = '[season]\nname = "Workflow check"\n'
    if allow:
        head += "allow_failed_trials = true\n"
    return head + "".join(
        f'\n[[trial]]\nfile = "t{s}/trial.toml"\nout = "runs/t{s}"\n' for s in SEEDS
    )


def make_season(plotsieve, root):
    root.mkdir(parents=True)
    for s in SEEDS:
        run([plotsieve, "simulate", f"t{s}", "--seed", str(s), "--quiet"], root)
    (root / "season.toml").write_text(season_text())


def files_under(folder):
    """Relative path -> bytes of every file under `folder`, leaving out the manifest (it
    records timings) and the engine's own timestamp."""
    out = {}
    for p in sorted(folder.rglob("*")):
        if p.is_file() and p.name not in ("manifest.json", ".snakemake_timestamp"):
            out[str(p.relative_to(folder))] = p.read_bytes()
    return out


def snakemake(sm, plotsieve, cwd, *extra, ok=True):
    cmd = [
        sm,
        "-s",
        SNAKEFILE,
        "--config",
        "season=season.toml",
        f"plotsieve={plotsieve}",
        "--cores",
        "2",
        *extra,
    ]
    return run(cmd, cwd, ok=ok)


def dry_run_jobs(sm, plotsieve, cwd):
    """(rules, trial run folders) the engine would run now."""
    p = snakemake(sm, plotsieve, cwd, "--dry-run")
    text = p.stdout + p.stderr
    rules = re.findall(r"^\s*(?:local)?rule (\w+):", text, re.M)
    runs = re.findall(r"wildcards: run=(\S+)", text)
    return sorted(rules), sorted(runs)


def check_identical(plotsieve, sm, work):
    by_engine, by_hand = work / "engine", work / "hand"
    make_season(plotsieve, by_engine)
    shutil.copytree(by_engine, by_hand)
    snakemake(sm, plotsieve, by_engine)
    for s in SEEDS:
        run([plotsieve, "run", f"t{s}/trial.toml", "--out", f"runs/t{s}", "--quiet"], by_hand)
    run([plotsieve, "season", "season.toml", "--quiet"], by_hand)
    for folder in [f"runs/t{s}" for s in SEEDS] + ["season-run"]:
        a, b = files_under(by_engine / folder), files_under(by_hand / folder)
        if not a or a.keys() != b.keys():
            raise SystemExit(f"{folder}: files differ: {sorted(a)} against {sorted(b)}")
        for name in a:
            if a[name] != b[name]:
                raise SystemExit(f"{folder}/{name} differs between the engine and by hand")
    tables = [n for n in files_under(by_engine / "season-run") if n.endswith(".csv")]
    if len(tables) < 2:
        raise SystemExit(f"season-run holds too few tables: {tables}")
    print(f"ok: 3 trials and the season byte-identical by the engine and by hand ({len(tables)} season tables)")
    return by_engine


def change_export(export):
    """One record's moisture changed by 0.01 %."""
    lines = export.read_text().splitlines(keepends=True)
    cells = lines[100].split(",")
    cells[6] = f"{float(cells[6]) + 0.01:.2f}"
    lines[100] = ",".join(cells)
    export.write_text("".join(lines))


def check_rerun(plotsieve, sm, work):
    rules, runs = dry_run_jobs(sm, plotsieve, work)
    if rules or runs:
        raise SystemExit(f"a finished season has work left: {rules} {runs}")
    change_export(work / f"t{SEEDS[1]}" / "monitor" / "field-A.csv")
    rules, runs = dry_run_jobs(sm, plotsieve, work)
    want_rules = ["all", "season", "trial"]
    if rules != want_rules or runs != [f"runs/t{SEEDS[1]}"]:
        raise SystemExit(f"after one export changed the dry run lists {rules} {runs}")
    snakemake(sm, plotsieve, work)
    print(f"ok: one export changed, the dry run lists {runs} and the season only")


def check_failure(plotsieve, sm, work):
    broken = SEEDS[2]
    design = work / f"t{broken}" / "design.csv"
    text = design.read_text()
    # A plot of the design with no treatment: ingest refuses the design.
    lines = text.splitlines(keepends=True)
    cells = lines[1].split(",")
    cells[1] = ""
    lines[1] = ",".join(cells)
    design.write_text("".join(lines))
    p = snakemake(sm, plotsieve, work, "--keep-going", ok=False)
    said = p.stdout + p.stderr
    if p.returncode == 0:
        raise SystemExit(f"a failed trial did not fail the workflow:\n{said}")
    want = f"plotsieve: trial t{broken}/trial.toml failed"
    if want not in said or "stage ingest" not in said:
        raise SystemExit(f"the failure does not name the trial and the stage:\n{said}")
    if (work / "season-run").exists():
        raise SystemExit("a season folder is left after a trial failed")
    # Allowed: the season is fitted without it, and says so.
    (work / "season.toml").write_text(season_text(allow=True))
    p = snakemake(sm, plotsieve, work)
    said = p.stdout + p.stderr
    if "the season leaves it out" not in said:
        raise SystemExit(f"the engine's output does not say the trial is left out:\n{said}")
    summary = (work / "season-run" / "summary.json").read_text()
    if f"trial t{broken}/trial.toml left out of the season" not in summary or "stage ingest" not in summary:
        raise SystemExit(f"the season's warnings do not name the trial and stage:\n{summary}")
    report = (work / "season-run" / "report.md").read_text()
    if f"trial t{broken}/trial.toml left out" not in report.split("## ", 2)[1]:
        raise SystemExit("the season report does not open with the trial left out")
    design.write_text(text)
    (work / "season.toml").write_text(season_text())
    snakemake(sm, plotsieve, work)
    print("ok: a failed trial is reported with its stage and stops the season; allowed, the season leaves it out and says so")


def check_lock(plotsieve, sm, work):
    held = SEEDS[0]
    change_export(work / f"t{held}" / "monitor" / "field-B.csv")
    lock = work / "runs" / f".t{held}.lock"
    with open(lock, "w") as f:
        fcntl.flock(f, fcntl.LOCK_EX | fcntl.LOCK_NB)
        f.write("pid 1\ncommand the check's own hold\n")
        f.flush()
        p = snakemake(sm, plotsieve, work, "--keep-going", ok=False)
        said = p.stdout + p.stderr
        if p.returncode == 0 or "the check's own hold" not in said:
            raise SystemExit(f"a held run folder was not refused naming its holder:\n{said}")
        if (work / "season-run").exists():
            raise SystemExit("the season folder is left after a trial job was refused")
    snakemake(sm, plotsieve, work)
    rules, runs = dry_run_jobs(sm, plotsieve, work)
    if rules or runs or not (work / "season-run" / "summary.json").exists():
        raise SystemExit(f"after the lock was released work is left: {rules} {runs}")
    print("ok: the run-folder lock refuses a trial job while another process holds it")


def main():
    a = argparse.ArgumentParser()
    a.add_argument("--plotsieve", required=True)
    a.add_argument("--snakemake", required=True)
    args = a.parse_args()
    plotsieve = os.path.abspath(args.plotsieve)
    sm = os.path.abspath(args.snakemake)
    with tempfile.TemporaryDirectory() as tmp:
        work = check_identical(plotsieve, sm, Path(tmp))
        check_rerun(plotsieve, sm, work)
        check_failure(plotsieve, sm, work)
        check_lock(plotsieve, sm, work)
    print("workflow checks passed")


if __name__ == "__main__":
    sys.exit(main())
