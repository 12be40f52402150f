#!/usr/bin/env python3
"""Side by side: the parts of `cistern simulate` that issue 14 sets targets for, against numpy
and scipy references and the floors they are measured against, on the same inputs, in one run.

    scripts/simulate-vs-numpy.py [--cistern target/release/cistern]
        [--timing target/release/examples/simulate_timing] [--runs 5]

Needs a release build of the binary and of the example (`cargo build --release --examples`),
numpy and scipy (`pip install numpy scipy`).

- Reading doses: a doses CSV of 100,000 rows (1,000 invented subjects, 100 one-hour-ish
  infusions each; columns subject, time_h, amount_mg, route, duration_h) read by
  `numpy.loadtxt` (structured dtype, strings for subject and route) and by cistern's reader
  (`Table::read` + `parse_doses`, which also checks every value), through the example.
- Engine on a uniform grid: oral doses of 500 mg every 12 h (CL 4.2 L/h, V 48 L, ka 1.1/h,
  F 0.9) at 1,000,000 times 0, 0.05, ..., 49,999.95 h. numpy/scipy: the per-step recurrence
  D <- e_a D, A <- e A + ka G D with doses added at grid points, run by `scipy.signal.lfilter`
  (two first-order passes in C). cistern: `engine::concentrations` (the example), and the same
  recurrence as a plain Rust loop (the floor). The script checks that cistern's CSV and the
  recurrence agree (relative 1e-9: lfilter's own rounding accumulates along the grid).
- CSV output: the 1,000,000 rows time_h,conc_mg_l. The floor: shortest round-trip text (zmij)
  of the same numbers into one reused buffer; cistern's `CsvWriter` into memory (the example);
  and the whole `cistern simulate` command writing the file (wall time, including the
  simulation). numpy's `savetxt` with '%.17g' (not shortest) is shown for scale.
Medians of --runs runs.
"""

import argparse
import io
import json
import os
import random
import subprocess
import sys
import tempfile
import time

import numpy as np
import scipy
from scipy.signal import lfilter

POINTS, STEP = 1_000_000, 0.05
CL, V, KA, F, AMOUNT, EVERY = 4.2, 48.0, 1.1, 0.9, 500.0, 12.0


def doses_file(path):
    rng = random.Random(14)
    with open(path, "w") as f:
        f.write("subject,time_h,amount_mg,route,duration_h\n")
        for s in range(1000):
            for j in range(100):
                t = 0.0 if j == 0 else 12.0 * j + round(rng.uniform(-0.5, 0.5), 3)
                f.write(f"s{s + 1},{t!r},{rng.choice([500, 750, 1000, 1250])},infusion,{rng.choice([0.5, 1, 1.5])}\n")


def loadtxt(path):
    dtype = [("subject", "U8"), ("time_h", "f8"), ("amount_mg", "f8"), ("route", "U8"), ("duration_h", "f8")]
    return np.loadtxt(path, delimiter=",", skiprows=1, dtype=dtype)


def recurrence():
    k = CL / V
    e, ea = np.exp(-k * STEP), np.exp(-KA * STEP)
    ka_g = KA * (np.exp(-k * STEP) - np.exp(-KA * STEP)) / (KA - k)
    every = round(EVERY / STEP)
    dosing = np.zeros(POINTS)
    dosing[::every] = F * AMOUNT
    depot = lfilter([1.0], [1.0, -ea], dosing)  # D_i after the dose at i
    central = lfilter([0.0, ka_g], [1.0, -e], depot)  # A_i = e A_(i-1) + ka G D_(i-1)
    return central / V


def median_time(runs, work):
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return float(np.median(times))


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cistern", default="target/release/cistern")
    ap.add_argument("--timing", default="target/release/examples/simulate_timing")
    ap.add_argument("--runs", type=int, default=5)
    a = ap.parse_args()
    print(f"numpy {np.__version__}, scipy {scipy.__version__}, Python {sys.version.split()[0]}; {os.cpu_count()} cores")
    print(f"load average before: {os.getloadavg()}")
    with tempfile.TemporaryDirectory() as tmp:
        doses, out = os.path.join(tmp, "doses.csv"), os.path.join(tmp, "sim.csv")
        doses_file(doses)
        numpy_read = median_time(a.runs, lambda: loadtxt(doses))
        numpy_grid = median_time(a.runs, recurrence)
        conc = recurrence()
        times = np.arange(POINTS) * STEP
        table = np.column_stack([times, conc])
        numpy_savetxt = median_time(a.runs, lambda: np.savetxt(io.StringIO(), table, fmt="%.17g", delimiter=","))
        timing = json.loads(subprocess.run(
            [a.timing, doses, str(POINTS), str(STEP), str(a.runs)], check=True, capture_output=True, text=True
        ).stdout)
        command = [
            a.cistern, "simulate", "--dose", f"{AMOUNT:g}mg", "--route", "oral", "--every", f"{EVERY:g}h",
            "--count", str(round(POINTS * STEP / EVERY)), "--cl", str(CL), "--v", str(V), "--ka", str(KA),
            "--f", str(F), "--times", f"0:{(POINTS - 1) * STEP:.2f}h:{STEP}h", "--allow-large", "--quiet",
            "--format", "csv", "-o", out,
        ]
        simulate = median_time(a.runs, lambda: subprocess.run(command, check=True, stderr=subprocess.DEVNULL))
        written = np.loadtxt(out, delimiter=",", skiprows=1)
    print(f"load average after: {os.getloadavg()}")
    assert written.shape == (POINTS, 2) and np.array_equal(written[:, 0], times)
    big = conc > 1e-12
    worst = float(np.max(np.abs(written[big, 1] / conc[big] - 1.0)))
    print(f"cistern's CSV against the lfilter recurrence: largest relative difference {worst:.2e}")
    ms = lambda s: f"{1e3 * s:8.1f} ms"
    rows = [
        ("read 100,000 doses", "numpy.loadtxt", numpy_read, "cistern Table::read + parse_doses", timing["read_doses"]),
        ("engine, 10^6 grid points", "scipy lfilter recurrence", numpy_grid, "cistern engine::concentrations", timing["engine_grid"]),
        ("engine, 10^6 grid points", "Rust recurrence (floor)", timing["recurrence"], "cistern engine::concentrations", timing["engine_grid"]),
        ("10^6 CSV rows in memory", "zmij into a reused buffer (floor)", timing["shortest_floor"], "cistern CsvWriter", timing["csv_rows"]),
        ("10^6 CSV rows", "numpy savetxt '%.17g' (not shortest)", numpy_savetxt, "cistern CsvWriter", timing["csv_rows"]),
        ("10^6 rows, whole command", "zmij into a reused buffer (floor)", timing["shortest_floor"], "cistern simulate (file written)", simulate),
    ]
    print(f"medians of {a.runs} runs; ratio = cistern / reference")
    for what, ref, t_ref, ours, t_ours in rows:
        print(f"  {what:26s} {ref:38s} {ms(t_ref)}   {ours:34s} {ms(t_ours)}   ratio {t_ours / t_ref:6.2f}")
    if worst > 1e-9:
        sys.exit("cistern and the recurrence disagree")


if __name__ == "__main__":
    main()
