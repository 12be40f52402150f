#!/usr/bin/env python3
"""Side by side: `cistern sweep` against a vectorised numpy script of the same steady-state
closed forms and percentiles, on the same inputs, in one run.

    scripts/sweep-vs-numpy.py [--cistern target/release/cistern] [--subjects 100000] [--runs 5]

The inputs: 100,000 virtual subjects (CL log-normal around 4 L/h with CV 30 %, V around 50 L
with CV 25 %, correlation 0.3 of the log-parameters; drawn here by numpy with a fixed seed and
handed to cistern as a parameters table, `--params`, so both sides see the very same subjects)
and 100 regimens of one-hour infusions: 250 to 5,000 mg in steps of 250 mg, every 6, 8, 12, 24
and 36 h. Targets AUC24 400-600 mg.h/L and trough at most 20 mg/L; limits peak 40 mg/L and
trough 25 mg/L.

The numpy side computes, per regimen and vectorised over the subjects, the steady-state closed
forms of a repeated infusion (docs/methods.md, section 5; k = CL/V, q = 1 - exp(-k tau)):

    peak = X (1 - exp(-k T)) / (T CL q)    trough = peak exp(-k (tau - T))    AUC24 = X 24 / (tau CL)

the counts (PTA, shares above the limits) and the nearest-rank 5th, 50th and 95th percentiles
of the three (np.partition at the three ranks). Its time covers that computation, on arrays
already in memory. The cistern side is the whole command, wall time: starting, reading the
100,000-row table, sweeping, writing the summary CSV. Both are run `--runs` times and the
medians compared. The script also checks that the two agree: the same counts, and percentiles
within the sketch's relative error of 0.1 % (docs/sweeps.md).
"""

import argparse
import csv
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

AMOUNTS = [250.0 * i for i in range(1, 21)]
INTERVALS = [6.0, 8.0, 12.0, 24.0, 36.0]
DURATION = 1.0
AUC_LO, AUC_HI, TROUGH_HI = 400.0, 600.0, 20.0
MAX_PEAK, MAX_TROUGH = 40.0, 25.0
PERCENTS = (5, 50, 95)
RELATIVE_ERROR = 1e-3


def subjects(n, seed=20261203):
    """CL and V of n subjects (the covariate-free model of tests/fixtures/plain_model.toml)."""
    rng = np.random.default_rng(seed)
    w_cl, w_v = (np.sqrt(np.log1p(cv * cv)) for cv in (0.30, 0.25))
    rho = 0.3
    z1, z2 = rng.standard_normal(n), rng.standard_normal(n)
    cl = 4.0 * np.exp(w_cl * z1)
    v = 50.0 * np.exp(w_v * (rho * z1 + np.sqrt(1.0 - rho * rho) * z2))
    return cl, v


def regimens():
    """Grid order of cistern: intervals, then amounts."""
    return [(x, tau) for tau in INTERVALS for x in AMOUNTS]


def nearest_rank(n, percent):
    """The rank (from 1) of the nearest-rank percentile: ceil(percent n / 100), at least 1."""
    return max(1, -(-percent * n // 100))


def numpy_sweep(cl, v):
    """Per regimen: PTA, shares above the limits, and the percentiles of trough, peak, AUC24."""
    n = cl.size
    k = cl / v
    ranks = [nearest_rank(n, p) - 1 for p in PERCENTS]
    rows = []
    for x, tau in regimens():
        q = -np.expm1(-k * tau)
        peak = -np.expm1(-k * DURATION) / (DURATION * cl * q) * x
        trough = peak * np.exp(-k * (tau - DURATION))
        auc24 = x * 24.0 / (tau * cl)
        meets = (auc24 >= AUC_LO) & (auc24 <= AUC_HI) & (trough <= TROUGH_HI)
        row = {
            "pta": np.count_nonzero(meets) / n,
            "p_over_peak": np.count_nonzero(peak > MAX_PEAK) / n,
            "p_over_trough": np.count_nonzero(trough > MAX_TROUGH) / n,
        }
        for name, values in (("trough", trough), ("peak", peak), ("auc24", auc24)):
            part = np.partition(values, ranks)
            for p, r in zip(PERCENTS, ranks):
                row[f"{name}_p{p:02d}"] = part[r]
        rows.append(row)
    return rows


def cistern_sweep(binary, params_csv, out_csv, threads):
    env = dict(os.environ, RAYON_NUM_THREADS=str(threads))
    args = [
        binary, "sweep", "--params", params_csv, "--amounts", "250..5000/250",
        "--every", ",".join(f"{t:g}h" for t in INTERVALS), "--durations", "1h",
        "--target", f"auc24={AUC_LO:g}..{AUC_HI:g}", "--target", f"trough=..{TROUGH_HI:g}",
        "--max-peak", f"{MAX_PEAK:g}", "--max-trough", f"{MAX_TROUGH:g}",
        "--quiet", "--format", "csv", "-o", out_csv,
    ]
    start = time.perf_counter()
    subprocess.run(args, env=env, check=True, stderr=subprocess.DEVNULL)
    return time.perf_counter() - start


def read_summary(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def compare(numpy_rows, cistern_rows):
    """The largest differences: counts (exactly equal expected) and relative percentile errors."""
    assert len(numpy_rows) == len(cistern_rows) == 100
    worst_share, worst_rel = 0.0, 0.0
    for a, b in zip(numpy_rows, cistern_rows):
        for key in ("pta", "p_over_peak", "p_over_trough"):
            worst_share = max(worst_share, abs(a[key] - float(b[key])))
        for name, unit in (("trough", "mg_l"), ("peak", "mg_l"), ("auc24", "mg_h_l")):
            for p in PERCENTS:
                want, got = a[f"{name}_p{p:02d}"], float(b[f"{name}_p{p:02d}_{unit}"])
                worst_rel = max(worst_rel, abs(got / want - 1.0))
    return worst_share, worst_rel


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cistern", default="target/release/cistern")
    ap.add_argument("--subjects", type=int, default=100_000)
    ap.add_argument("--runs", type=int, default=5)
    a = ap.parse_args()
    n, evaluations = a.subjects, a.subjects * 100
    print(f"numpy {np.__version__}, Python {sys.version.split()[0]}; {os.cpu_count()} cores")
    print(f"load average before: {os.getloadavg()}")
    cl, v = subjects(n)
    with tempfile.TemporaryDirectory() as tmp:
        params_csv, out_csv = os.path.join(tmp, "params.csv"), os.path.join(tmp, "summary.csv")
        with open(params_csv, "w") as f:
            f.write("subject,cl_l_h,v_l\n")
            f.writelines(f"s{i + 1},{c!r},{w!r}\n" for i, (c, w) in enumerate(zip(cl.tolist(), v.tolist())))
        times = {"numpy": [], "cistern, 1 thread": [], "cistern, 2 threads": []}
        for _ in range(a.runs):
            start = time.perf_counter()
            reference = numpy_sweep(cl, v)
            times["numpy"].append(time.perf_counter() - start)
            times["cistern, 1 thread"].append(cistern_sweep(a.cistern, params_csv, out_csv, 1))
            times["cistern, 2 threads"].append(cistern_sweep(a.cistern, params_csv, out_csv, 2))
        share, rel = compare(reference, read_summary(out_csv))
    peak_rss_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"load average after: {os.getloadavg()}")
    print(f"{n} subjects x 100 regimens = {evaluations} evaluations; medians of {a.runs} runs")
    median = {k: float(np.median(t)) for k, t in times.items()}
    for k, t in median.items():
        spread = ", ".join(f"{x:.3f}" for x in times[k])
        print(f"  {k:20s} {t:7.3f} s  ({1e9 * t / evaluations:6.1f} ns per subject-regimen; runs {spread})")
    for k in ("cistern, 1 thread", "cistern, 2 threads"):
        print(f"  numpy / {k}: {median['numpy'] / median[k]:.2f}x")
    print(f"  peak resident set of the cistern runs: {peak_rss_mb:.0f} MB")
    print(f"agreement: largest difference of a share {share:.3g}; largest relative difference of a percentile {rel:.3g}")
    if share > 0.0 or rel > RELATIVE_ERROR * (1 + 1e-9):
        sys.exit("cistern and numpy disagree beyond the sketch's stated accuracy")


if __name__ == "__main__":
    main()
