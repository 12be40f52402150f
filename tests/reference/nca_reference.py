"""Reference values for `cistern nca` on open data (R's Theoph and Indometh, exported to CSV by
nca/export_datasets.R), computed independently of cistern with numpy and scipy.

    python3 tests/reference/nca_reference.py > tests/reference/nca_reference.json

The rules are those docs/methods.md states for `cistern nca`, written again here from their
formulas (no code is shared):
- a level at the dose time is used as measured; after a bolus without one, the level then is
  the back-extrapolation C1 * (C1/C2)**(t1/(t2 - t1)) of the first two levels when they fall;
- AUC steps: linear, or logarithmic (C1 - C2)/ln(C1/C2) * dt where the rule says so
  (linear-up-log-down: where the level falls; linear-log: from the peak on);
- lambda_z: scipy.stats.linregress of ln C on t over the last n >= 3 positive levels after the
  peak (from the peak after a bolus); the best adjusted R^2, then the most levels within 1e-4;
  or every positive level in a window;
- AUC to infinity, AUMC, MRT, CL (or CL/F), Vz (or Vz/F), Vss, partial AUCs.
"""

import csv
import json
import math
import os
import sys

import numpy as np
import scipy
from scipy import stats

HERE = os.path.join(os.path.dirname(os.path.abspath(__file__)), "nca")


def read(name):
    with open(os.path.join(HERE, name)) as f:
        return list(csv.DictReader(line for line in f if not line.startswith("#")))


def study(prefix):
    doses = {r["subject"]: (float(r["amount_mg"]), r["route"]) for r in read(prefix + "_doses.csv")}
    levels = {}
    for r in read(prefix + "_levels.csv"):
        levels.setdefault(r["subject"], []).append((float(r["time_h"]), float(r["conc_mg_l"])))
    return {s: (doses[s], sorted(v)) for s, v in levels.items()}


def is_log(rule, c1, c2, t1, tmax):
    if c1 <= 0 or c2 <= 0 or c1 == c2:
        return False
    if rule == "linear-up-log-down":
        return c2 < c1
    if rule == "linear-log":
        return t1 >= tmax
    return False


def piece(t1, c1, t2, c2, log):
    """Area and first moment of one step."""
    dt = t2 - t1
    if log:
        k = math.log(c1 / c2) / dt
        return (c1 - c2) / k, (t1 * c1 - t2 * c2) / k + (c1 - c2) / k**2
    return dt * (c1 + c2) / 2, dt * (t1 * c1 + t2 * c2) / 2


def level_in_step(t1, c1, t2, c2, log, t):
    if log:
        return c1 * math.exp(math.log(c2 / c1) * (t - t1) / (t2 - t1))
    return c1 + (c2 - c1) * (t - t1) / (t2 - t1)


def area(ts, cs, rule, tmax, a, b, lam):
    """AUC from a to b: steps clipped to [a, b], the terminal exponential past the last level."""
    total = 0.0
    for i in range(len(ts) - 1):
        t1, c1, t2, c2 = ts[i], cs[i], ts[i + 1], cs[i + 1]
        lo, hi = max(t1, a), min(t2, b)
        if lo >= hi:
            continue
        log = is_log(rule, c1, c2, t1, tmax)
        total += piece(lo, level_in_step(t1, c1, t2, c2, log, lo), hi, level_in_step(t1, c1, t2, c2, log, hi), log)[0]
    if b > ts[-1]:
        if lam is None:
            return None
        lo = max(a, ts[-1])
        total += cs[-1] / lam * (math.exp(-lam * (lo - ts[-1])) - math.exp(-lam * (b - ts[-1])))
    return total


def regression(points):
    t = np.array([p[0] for p in points])
    y = np.log(np.array([p[1] for p in points]))
    fit = stats.linregress(t, y)
    n = len(points)
    r2 = fit.rvalue**2
    return {
        "lambda_z": -fit.slope,
        "intercept": fit.intercept,
        "r2": r2,
        "adj_r2": 1 - (1 - r2) * (n - 1) / (n - 2),
        "n": n,
        "from": points[0][0],
        "to": points[-1][0],
    }


def terminal(measured, tmax, bolus, window):
    positive = [p for p in measured if p[1] > 0]
    if window is not None:
        pts = [p for p in positive if window[0] <= p[0] <= window[1]]
        if len(pts) < 3:
            return None
        fit = regression(pts)
        return fit if fit["lambda_z"] > 0 else None
    after = [p for p in positive if p[0] > tmax or (bolus and p[0] >= tmax)]
    fits = [regression(after[-n:]) for n in range(3, len(after) + 1)]
    fits = [f for f in fits if f["lambda_z"] > 0]
    if not fits:
        return None
    best = max(f["adj_r2"] for f in fits)
    return max((f for f in fits if f["adj_r2"] >= best - 1e-4), key=lambda f: f["n"])


def nca(dose, route, levels, rule, window, partial):
    measured = list(levels)
    cmax = max(c for _, c in measured)
    tmax = next(t for t, c in measured if c == cmax)
    positive = [(t, c) for t, c in measured if c > 0]
    tlast, clast = positive[-1]
    profile = list(measured)
    if profile[0][0] > 0:
        if route == "bolus":
            (t1, c1), (t2, c2) = positive[0], positive[1]
            c0 = c1 * (c1 / c2) ** (t1 / (t2 - t1)) if c2 < c1 else c1
        else:
            c0 = 0.0
        profile.insert(0, (0.0, c0))
    ts = [t for t, _ in profile]
    cs = [c for _, c in profile]
    fit = terminal(measured, tmax, route == "bolus", window)
    lam = fit["lambda_z"] if fit else None
    auc_last = area(ts, cs, rule, tmax, 0.0, tlast, None)
    aumc_last = 0.0
    for i in range(len(ts) - 1):
        if ts[i + 1] > tlast:
            break
        aumc_last += piece(ts[i], cs[i], ts[i + 1], cs[i + 1], is_log(rule, cs[i], cs[i + 1], ts[i], tmax))[1]
    out = {
        "cmax_mg_l": cmax,
        "tmax_h": tmax,
        "clast_mg_l": clast,
        "tlast_h": tlast,
        "tfirst_h": positive[0][0],
        "auc_last_mg_h_l": auc_last,
        "aumc_last_mg_h2_l": aumc_last,
    }
    if fit:
        auc_inf = auc_last + clast / lam
        clast_pred = math.exp(fit["intercept"] - lam * tlast)
        aumc_inf = aumc_last + tlast * clast / lam + clast / lam**2
        mrt = aumc_inf / auc_inf
        cl = dose / auc_inf
        out.update({
            "lambda_z_per_h": lam,
            "lambda_z_r2": fit["r2"],
            "lambda_z_adj_r2": fit["adj_r2"],
            "lambda_z_points": fit["n"],
            "lambda_z_from_h": fit["from"],
            "lambda_z_to_h": fit["to"],
            "half_life_h": math.log(2) / lam,
            "auc_inf_obs_mg_h_l": auc_inf,
            "auc_inf_pred_mg_h_l": auc_last + clast_pred / lam,
            "auc_extrap_pct": 100 * (auc_inf - auc_last) / auc_inf,
            "aumc_inf_obs_mg_h2_l": aumc_inf,
            "mrt_h": mrt,
        })
        if route == "oral":
            out.update({"cl_f_l_h": cl, "vz_f_l": cl / lam})
        else:
            out.update({"cl_l_h": cl, "vz_l": cl / lam, "vss_l": mrt * cl})
    else:
        for key in ["lambda_z_per_h", "half_life_h", "auc_inf_obs_mg_h_l", "mrt_h"]:
            out[key] = None
    out["partial_auc_mg_h_l"] = area(ts, cs, rule, tmax, partial[0], partial[1], lam)
    return out


CASES = [
    # (data set, AUC rule, lambda_z window or None, partial AUC window)
    ("theoph", "linear-up-log-down", None, (0.0, 12.0)),
    ("theoph", "linear", None, (0.0, 12.0)),
    ("theoph", "linear-log", None, (2.0, 30.0)),
    ("theoph", "linear-up-log-down", (8.0, 24.0), (1.0, 6.0)),
    ("indometh", "linear-up-log-down", None, (0.0, 12.0)),
    ("indometh", "linear", None, (0.5, 4.0)),
    ("indometh", "linear-log", (2.0, 8.0), (0.0, 8.0)),
]


def main():
    cases = []
    for name, rule, window, partial in CASES:
        subjects = {
            s: nca(dose, route, levels, rule, window, partial)
            for s, ((dose, route), levels) in study(name).items()
        }
        cases.append({
            "data": name,
            "auc_rule": rule,
            "lambda_z_window_h": window,
            "partial_h": partial,
            "subjects": subjects,
        })
    json.dump(
        {"numpy": np.__version__, "scipy": scipy.__version__, "python": sys.version.split()[0], "cases": cases},
        sys.stdout,
        indent=1,
    )
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
