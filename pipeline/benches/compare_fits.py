#!/usr/bin/env python3
"""How far one run's fitted results moved from another's, in posterior SD units.

Usage: compare_fits.py RUN_OLD RUN_NEW [RUN_OLD RUN_NEW ...]

Reads each run folder's 4-adjust/treatments.csv (standard library only) and, over every
row both runs hold (field, treatment), prints the largest and the median of:
  - mean shift: |new - old| / old SD, for the estimate, the uplift and the new-field uplift;
  - SD ratio: new SD / old SD (reported as the largest |ratio - 1|);
  - quantile shift: |new - old| / old SD for the 90 % and 95 % interval ends;
  - probability: |new - old| for every P(...) column.
These are the accuracy figures a change to the integration over the hyperparameters is held
to (tolerances: means 0.03 SD, median 0.01; SDs 3 %; quantiles 0.05 SD; probabilities 0.01).
Rows or columns one run lacks are listed, never skipped silently.
"""
import csv
import statistics
import sys
from pathlib import Path


def rows(run):
    path = Path(run) / "4-adjust" / "treatments.csv"
    with open(path, newline="") as f:
        return {(r["field"], r["treatment"]): r for r in csv.DictReader(f)}


def num(r, k):
    v = r.get(k, "")
    try:
        return float(v)
    except ValueError:
        return None


def unit_of(header):
    # The estimate column carries the output unit: estimate_t_ha, estimate_bu_ac, ...
    est = [h for h in header if h.startswith("estimate_")]
    return est[0][len("estimate_"):] if est else "t_ha"


# (value column, its SD column) for mean shifts and SD ratios.
MEANS = [("estimate", "sd"), ("uplift", "uplift_sd"), ("new_field_uplift", "new_field_sd")]
# (interval end, the SD it is measured in)
QUANTILES = [
    ("uplift_lo90", "uplift_sd"), ("uplift_hi90", "uplift_sd"),
    ("uplift_lo95", "uplift_sd"), ("uplift_hi95", "uplift_sd"),
    ("new_field_lo90", "new_field_sd"), ("new_field_hi90", "new_field_sd"),
    ("new_field_lo95", "new_field_sd"), ("new_field_hi95", "new_field_sd"),
]


def compare(old_run, new_run):
    old, new = rows(old_run), rows(new_run)
    missing = sorted(set(old) ^ set(new))
    some = next(iter(old.values()))
    u = unit_of(list(some.keys()))
    probs = [k for k in some if k.startswith("p_")]
    shifts, ratios, qshifts, pdiffs = [], [], [], []
    for key in sorted(set(old) & set(new)):
        a, b = old[key], new[key]
        for m, s in MEANS:
            x, y, sd = num(a, f"{m}_{u}"), num(b, f"{m}_{u}"), num(a, f"{s}_{u}")
            if x is not None and y is not None and sd:
                shifts.append((abs(y - x) / sd, key, m))
            sd2 = num(b, f"{s}_{u}")
            if sd and sd2:
                ratios.append((abs(sd2 / sd - 1.0), key, s))
        for q, s in QUANTILES:
            x, y, sd = num(a, f"{q}_{u}"), num(b, f"{q}_{u}"), num(a, f"{s}_{u}")
            if x is not None and y is not None and sd:
                qshifts.append((abs(y - x) / sd, key, q))
        for p in probs:
            x, y = num(a, p), num(b, p)
            if x is not None and y is not None:
                pdiffs.append((abs(y - x), key, p))
    return missing, shifts, ratios, qshifts, pdiffs


def line(name, xs, fmt):
    if not xs:
        return f"  {name:<34} (none)"
    top = max(xs)
    med = statistics.median(x[0] for x in xs)
    return f"  {name:<34} largest {fmt.format(top[0])} ({top[1][0]} / {top[1][1]}, {top[2]}), median {fmt.format(med)}, {len(xs)} values"


def main(args):
    if len(args) < 2 or len(args) % 2:
        sys.exit(__doc__)
    for old_run, new_run in zip(args[::2], args[1::2]):
        missing, shifts, ratios, qshifts, pdiffs = compare(old_run, new_run)
        print(f"{old_run} -> {new_run}")
        if missing:
            print(f"  rows in one run only: {missing}")
        print(line("mean shift (old SD units)", shifts, "{:.4f}"))
        print(line("SD ratio, |new/old - 1|", ratios, "{:.4f}"))
        print(line("interval-end shift (old SD units)", qshifts, "{:.4f}"))
        print(line("probability difference", pdiffs, "{:.4f}"))


if __name__ == "__main__":
    main(sys.argv[1:])
