#!/usr/bin/env python3
"""Brute-force marginal likelihoods of population pharmacokinetic models, for `cistern population`.

Run from the repository root:

    python3 tests/reference/population/likelihood.py cases  > tests/reference/population/likelihood.json
    python3 tests/reference/population/likelihood.py theoph   # after theoph.R: adds the exact -2LL to theoph/nlme.json

It needs numpy and scipy. CI does not run it: the tests read the committed JSON. The script
shares no code with cistern: it reads the case files (cistern's CSV and TOML formats, the small
subset used here) with its own readers, writes the one-compartment model again as the closed-form
superposition of one curve per dose, and integrates each subject's marginal likelihood

    L_i = integral of  prod_levels p(y | theta) * N(theta; mu_i, Omega)  d theta

by a dense tensor-product trapezoid rule, with no Gauss-Hermite rule anywhere:

  * theta = (ln CL, ln V[, ln ka]) = mu_i + C z with C the Cholesky factor of Omega, so that
    L_i = integral of prod p(y | mu_i + C z) * phi(z) dz with phi the standard normal density
    (the Jacobian det C cancels the normal density's normalising constant);
  * z runs over the box [-9, 9]^d (the prior mass outside it is below 2e-18 per dimension) for
    the invented cases, and over a sub-box of it holding the integrand for the theophylline data
    (`posterior_box`, checked against the full box), on a grid of n points per dimension,
    endpoints included;
  * n goes 33, 65, 129, 257, ... (the step halves) until L_i changes by less than 1e-9 relative
    between two successive grids; the JSON records both values. The trapezoid rule converges
    geometrically for a smooth integrand that vanishes at the ends of the interval, so the
    change between two grids bounds the error of the coarser one;
  * as further checks, the cases are also integrated over the sub-box and, in two dimensions,
    by scipy's adaptive nquad;
  * as a check that the box holds the integrand, the largest integrand on the faces of the box is
    recorded relative to the largest inside (`boundary_max_relative`).

Sums are taken in log space (the largest term factored out) so that nothing underflows.

Likelihood of one level (docs/methods.md, section 7.3): sigma^2 = a^2 + (b f)^2; a quantified y
contributes the normal density N(y; f, sigma^2) with its 1/sqrt(2 pi sigma^2); a level below the
limit LLOQ contributes Phi((LLOQ - f) / sigma) (the M3 method, Beal 2001). The objective is
-2 sum_i ln L_i.

All case data under cases/ are INVENTED (a fictional drug); the theophylline data under theoph/
are R's `Theoph` data set (see README.md).
"""

import csv
import json
import math
import platform
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import scipy
from scipy.integrate import nquad
from scipy.special import log_ndtr

HERE = Path(__file__).resolve().parent
CASES = ["one_infusion", "several_infusion", "one_oral", "several_oral", "bolus"]
HALF_WIDTH = 9.0  # the box in whitened coordinates, in prior standard deviations
TOLERANCE = 1e-9  # relative change of L_i between two successive grids
FIRST_N = 33
MAX_POINTS = 600_000_000  # refuse a grid larger than this (n^d)
CHUNK = 2_000_000  # grid points evaluated at once

TIME_UNITS = {"h": 1.0, "min": 1.0 / 60.0}


# ---------------------------------------------------------------------------------------------
# Readers (only the subset of cistern's formats that these cases use; anything else is refused).


def read_csv(path):
    """Rows of a CSV file as dicts with lower-case keys; `#` lines and blank lines skipped."""
    with open(path, newline="", encoding="utf-8") as handle:
        lines = [line for line in handle if line.strip() and not line.lstrip().startswith("#")]
    reader = csv.DictReader(lines)
    return [{k.strip().lower(): (v or "").strip() for k, v in row.items()} for row in reader]


def time_column(row, quantity):
    """The value of `<quantity>_<unit>` in hours, or None when the column is absent or empty."""
    for key, value in row.items():
        if key.startswith(quantity + "_"):
            unit = key[len(quantity) + 1 :]
            if unit not in TIME_UNITS:
                raise ValueError(f"unsupported unit in column {key}")
            return float(value) * TIME_UNITS[unit] if value else None
    return None


def read_doses(path):
    """Doses per subject, each expanded: (time_h, amount_mg, route, duration_h)."""
    doses = {}
    for row in read_csv(path):
        subject = row.get("subject", "")
        amount = float(row["amount_mg"])
        route = row["route"].lower()
        start = time_column(row, "time")
        duration = time_column(row, "duration") or 0.0
        every = time_column(row, "every")
        count = int(row["count"]) if row.get("count") else 1
        for j in range(count):
            doses.setdefault(subject, []).append((start + j * (every or 0.0), amount, route, duration))
    return doses


def read_levels(path):
    """Levels per subject, each (time_h, value_mg_l, below_limit)."""
    levels = {}
    for row in read_csv(path):
        text = row["conc_mg_l"]
        if text.startswith("<"):
            entry = (float(row["time_h"]), float(text[1:]), True)
        else:
            entry = (float(row["time_h"]), float(text), False)
        levels.setdefault(row.get("subject", ""), []).append(entry)
    return levels


def read_covariates(path):
    if not path.exists():
        return {}
    return {row["subject"]: {k: float(v) for k, v in row.items() if k != "subject"} for row in read_csv(path)}


def covariate_factor(effect, x):
    form, ref, e = effect["form"], float(effect["reference"]), float(effect["effect"])
    if form == "power":
        return (x / ref) ** e
    if form == "linear":
        return 1.0 + e * (x - ref)
    if form == "exponential":
        return math.exp(e * (x - ref))
    raise ValueError(f"unknown covariate form {form}")


def read_model(path):
    """The population model: typical values, the covariate effects, Omega, residual, F, lag."""
    with open(path, "rb") as handle:
        m = tomllib.load(handle)
    cl_cv, v_cv = m["clearance"]["bsv_cv"], m["volume"]["bsv_cv"]
    omegas = [math.sqrt(math.log1p(cl_cv**2)), math.sqrt(math.log1p(v_cv**2))]
    absorption = m.get("absorption")
    ka_random = absorption is not None and absorption.get("bsv_cv", 0.0) > 0.0
    if ka_random:
        omegas.append(math.sqrt(math.log1p(absorption["bsv_cv"] ** 2)))
    d = len(omegas)
    corr = np.eye(d)
    rho = m.get("correlation", {}).get("cl_v", 0.0)
    corr[0, 1] = corr[1, 0] = rho
    omega = np.outer(omegas, omegas) * corr
    return {
        "cl": m["clearance"]["typical_l_h"],
        "v": m["volume"]["typical_l"],
        "cl_covariates": m["clearance"].get("covariates", []),
        "v_covariates": m["volume"].get("covariates", []),
        "ka": absorption["typical_ka_per_h"] if absorption else None,
        "ka_random": ka_random,
        "f": absorption.get("f", 1.0) if absorption else 1.0,
        "tlag": absorption.get("tlag_h", 0.0) if absorption else 0.0,
        "omega": omega,
        "a": m["residual"]["additive_mg_l"],
        "b": m["residual"]["proportional_cv"],
    }


def typical_log(model, covariates):
    """mu_i: the logs of the subject's covariate-adjusted typical values (CL, V[, ka])."""
    cl, v = model["cl"], model["v"]
    for eff in model["cl_covariates"]:
        cl *= covariate_factor(eff, covariates[eff["covariate"]])
    for eff in model["v_covariates"]:
        v *= covariate_factor(eff, covariates[eff["covariate"]])
    mu = [math.log(cl), math.log(v)]
    if model["ka_random"]:
        mu.append(math.log(model["ka"]))
    return np.array(mu)


# ---------------------------------------------------------------------------------------------
# The model: closed-form superposition, one curve per dose.


def concentration(t, doses, cl, v, ka, f, tlag):
    """Concentration (mg/L) at time t for arrays of CL, V and ka (the same shape)."""
    k = cl / v
    c = np.zeros_like(cl)
    for t0, amount, route, duration in doses:
        if route == "bolus":
            if t >= t0:
                c = c + amount / v * np.exp(-k * (t - t0))
        elif route == "infusion":
            rate = amount / duration
            if t0 <= t < t0 + duration:
                c = c + rate / cl * -np.expm1(-k * (t - t0))
            elif t >= t0 + duration:
                c = c + rate / cl * -np.expm1(-k * duration) * np.exp(-k * (t - t0 - duration))
        elif route == "oral":
            tau = t - t0 - tlag
            if tau > 0:
                # F D ka / (V (ka - k)) (e^{-k tau} - e^{-ka tau}), written as
                # F D ka / V * tau * e^{-min(k, ka) tau} * (1 - e^{-x}) / x with
                # x = |ka - k| tau, which stays accurate as ka approaches k and never overflows.
                x = np.abs(ka - k) * tau
                safe = np.where(x == 0.0, 1.0, x)
                ratio = np.where(x == 0.0, 1.0, -np.expm1(-safe) / safe)
                c = c + f * amount * ka / v * tau * np.exp(-np.minimum(k, ka) * tau) * ratio
        else:
            raise ValueError(f"unknown route {route}")
    return c


def log_likelihood_levels(theta, doses, levels, model):
    """ln prod_levels p(y | theta) for each row of theta (shape (N, d))."""
    cl, v = np.exp(theta[:, 0]), np.exp(theta[:, 1])
    ka = np.exp(theta[:, 2]) if model["ka_random"] else np.full_like(cl, model["ka"] or 1.0)
    total = np.zeros(theta.shape[0])
    for t, value, below in levels:
        fpred = concentration(t, doses, cl, v, ka, model["f"], model["tlag"])
        s2 = model["a"] ** 2 + (model["b"] * fpred) ** 2
        # With a proportional-only error a prediction that underflows to 0 (far out on the
        # grid) has sigma = 0: a point mass at 0, under which a positive level is impossible.
        zero = s2 == 0.0
        s2 = np.where(zero, 1.0, s2)
        if below:
            term = log_ndtr((value - fpred) / np.sqrt(s2))
            term = np.where(zero, 0.0, term)  # 0 < LLOQ: certain
        else:
            term = -0.5 * (np.log(2.0 * np.pi * s2) + (value - fpred) ** 2 / s2)
            term = np.where(zero, -np.inf, term)
        total += term
    return total


# ---------------------------------------------------------------------------------------------
# The integral.


def grid_chunks(n, box):
    """The tensor grid of n points per dimension over box (shape (d, 2)), in chunks of rows.

    Yields z (points, d), the log trapezoid weights plus ln phi(z), and whether each point lies
    on a face of the box.
    """
    d = len(box)
    nodes = [np.linspace(lo, hi, n) for lo, hi in box]
    log_w = []
    for x in nodes:
        w = np.full(n, x[1] - x[0])
        w[0] = w[-1] = w[0] / 2.0
        log_w.append(np.log(w) - 0.5 * x**2 - 0.5 * math.log(2.0 * math.pi))
    if n**d > MAX_POINTS:
        raise RuntimeError(f"grid of {n}^{d} points is too large")
    idx = np.stack(np.meshgrid(*([np.arange(n)] * (d - 1)), indexing="ij"), axis=-1).reshape(-1, d - 1)
    rest = np.stack([nodes[j + 1][idx[:, j]] for j in range(d - 1)], axis=1)
    rest_logw = sum(log_w[j + 1][idx[:, j]] for j in range(d - 1))
    rest_edge = ((idx == 0) | (idx == n - 1)).any(axis=1)
    rows_per_chunk = max(1, CHUNK // len(idx))
    for start in range(0, n, rows_per_chunk):
        first = np.arange(start, min(n, start + rows_per_chunk))
        m = len(idx)
        z = np.concatenate([np.repeat(nodes[0][first], m)[:, None], np.tile(rest, (len(first), 1))], axis=1)
        logw = np.repeat(log_w[0][first], m) + np.tile(rest_logw, len(first))
        edge = np.repeat((first == 0) | (first == n - 1), m) | np.tile(rest_edge, len(first))
        yield z, logw, edge


def log_integral(n, box, chol, mu, doses, levels, model):
    """ln of the trapezoid rule on n points per dimension over the box, and the boundary check:
    ln of (largest integrand on the faces of the box / largest integrand on the grid)."""
    running_max, running_sum = -np.inf, 0.0
    inner_max, edge_max = -np.inf, -np.inf
    for z, logw, edge in grid_chunks(n, box):
        log_lik = log_likelihood_levels(mu + z @ chol.T, doses, levels, model)
        log_g = log_lik - 0.5 * (z**2).sum(axis=1)  # the integrand, up to a constant
        inner_max = max(inner_max, log_g.max())
        if edge.any():
            edge_max = max(edge_max, log_g[edge].max())
        terms = log_lik + logw  # logw holds the trapezoid weights and ln phi(z)
        m = terms.max()
        if m == -np.inf:
            continue
        if m > running_max:
            running_sum = running_sum * math.exp(running_max - m) if running_max > -np.inf else 0.0
            running_max = m
        running_sum += np.exp(terms - running_max).sum()
    return running_max + math.log(running_sum), edge_max - inner_max


def full_box(d):
    return np.array([[-HALF_WIDTH, HALF_WIDTH]] * d)


def posterior_box(chol, mu, doses, levels, model):
    """A sub-box of [-9, 9]^d holding every point where the integrand is within e^-50 of its
    largest value, found on a grid of 65 points per dimension over the full box and widened by
    two of its steps on each side (then clipped to the full box). Used where the full box would
    need too fine a grid (the rich theophylline profiles); the boundary check of the final grid
    confirms that the integrand is negligible on the faces."""
    d = len(mu)
    box = full_box(d)
    n = 65
    step = 2.0 * HALF_WIDTH / (n - 1)
    kept, best = [], -np.inf
    for z, _, _ in grid_chunks(n, box):
        log_g = log_likelihood_levels(mu + z @ chol.T, doses, levels, model) - 0.5 * (z**2).sum(axis=1)
        best = max(best, log_g.max())
        kept.append((z, log_g))
    lo, hi = np.full(d, np.inf), np.full(d, -np.inf)
    for z, log_g in kept:
        inside = z[log_g >= best - 50.0]
        if len(inside):
            lo = np.minimum(lo, inside.min(axis=0))
            hi = np.maximum(hi, inside.max(axis=0))
    return np.stack([np.maximum(lo - 2 * step, -HALF_WIDTH), np.minimum(hi + 2 * step, HALF_WIDTH)], axis=1)


def subject_integral(box, chol, mu, doses, levels, model):
    """Refine the grid (halve the step) until L_i changes by less than 1e-9 relative; both
    resolutions are kept as the evidence."""
    n = FIRST_N
    previous = None
    history = []
    while True:
        started = time.perf_counter()
        log_l, boundary = log_integral(n, box, chol, mu, doses, levels, model)
        history.append({"n_per_dim": n, "minus2ll": -2.0 * log_l, "seconds": round(time.perf_counter() - started, 3)})
        if previous is not None:
            rel = abs(math.expm1(log_l - previous))
            if rel < TOLERANCE:
                return {
                    "minus2ll": -2.0 * log_l,
                    "convergence": {
                        "box_whitened": box.tolist(),
                        "final_n_per_dim": n,
                        "final_minus2ll": -2.0 * log_l,
                        "previous_n_per_dim": (n - 1) // 2 + 1,
                        "previous_minus2ll": -2.0 * previous,
                        "relative_change_of_likelihood": rel,
                        "boundary_max_relative": math.exp(boundary),
                        "history": history,
                    },
                }
        previous = log_l
        n = 2 * (n - 1) + 1


def nquad_minus2ll(chol, mu, doses, levels, model):
    """A second, independent integration for two-dimensional cases: scipy's adaptive nquad over
    the full box (too slow in three dimensions)."""
    d = len(mu)

    def integrand(*z):
        z = np.array(z)
        log_lik = log_likelihood_levels((mu + chol @ z)[None, :], doses, levels, model)[0]
        return math.exp(log_lik - 0.5 * z @ z) / (2.0 * math.pi) ** (d / 2)

    value, error = nquad(integrand, full_box(d).tolist(), opts={"epsabs": 0.0, "epsrel": 1e-11, "limit": 200})
    return {"minus2ll": -2.0 * math.log(value), "estimated_relative_error": error / value}


def evaluate(directory, model_name, primary_box, full_box_check_subjects=0):
    """-2 ln L_i of every subject and the total.

    primary_box "full": the result is the integral over [-9, 9]^d; as checks, the same integral
    over the posterior box (the method used for the theophylline data) and, in two dimensions,
    scipy's nquad. primary_box "posterior": the result is the integral over the posterior box;
    as a check, for the first `full_box_check_subjects` subjects, the full box on 257 points per
    dimension."""
    model = read_model(directory / model_name)
    doses = read_doses(directory / "doses.csv")
    levels = read_levels(directory / "levels.csv")
    covariates = read_covariates(directory / "covariates.csv")
    chol = np.linalg.cholesky(model["omega"])
    d = len(model["omega"])
    subjects = []
    for number, (subject, subject_levels) in enumerate(levels.items()):
        mu = typical_log(model, covariates.get(subject, {}))
        args = (chol, mu, doses[subject], subject_levels, model)
        sub_box = posterior_box(*args)
        checks = {}
        if primary_box == "full":
            result = subject_integral(full_box(d), *args)
            checks["posterior_box_minus2ll"] = subject_integral(sub_box, *args)["minus2ll"]
            if d == 2:
                checks["nquad"] = nquad_minus2ll(*args)
        else:
            result = subject_integral(sub_box, *args)
            if number < full_box_check_subjects:
                log_l, boundary = log_integral(257, full_box(d), *args)
                checks["full_box_257_per_dim_minus2ll"] = -2.0 * log_l
        print(f"  {subject}: {result['minus2ll']} {checks}", file=sys.stderr)
        subjects.append({"subject": subject, "n_levels": len(subject_levels), **result, "checks": checks})
    total = math.fsum(s["minus2ll"] for s in subjects)
    return {
        "model_file": model_name,
        "dimensions": d,
        "n_subjects": len(subjects),
        "n_levels": sum(s["n_levels"] for s in subjects),
        "n_below_limit": sum(1 for ls in levels.values() for _, _, b in ls if b),
        "total_minus2ll": total,
        "subjects": subjects,
    }


def versions():
    return {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__}


def main():
    what = sys.argv[1] if len(sys.argv) > 1 else "cases"
    if what == "cases":
        out = {
            "generated_by": "tests/reference/population/likelihood.py cases",
            "method": "tensor-product trapezoid rule over [-9, 9]^d in the prior's whitened coordinates, "
            "step halved until L_i changes by < 1e-9 relative; checks: the posterior box, and scipy nquad in 2-D",
            **versions(),
            "cases": {},
        }
        for name in CASES:
            print(name, file=sys.stderr)
            out["cases"][name] = evaluate(HERE / "cases" / name, "model.toml", "full")
        json.dump(out, sys.stdout, indent=2)
        print()
    elif what == "theoph":
        d = HERE / "theoph"
        result = evaluate(d, "nlme_model.toml", "posterior", full_box_check_subjects=2)
        path = d / "nlme.json"
        nlme = json.loads(path.read_text())
        nlme["exact_minus2ll_at_nlme_estimates"] = result["total_minus2ll"]
        nlme["exact_evaluation"] = {
            "generated_by": "tests/reference/population/likelihood.py theoph",
            "method": "tensor-product trapezoid rule over the posterior box in the prior's whitened coordinates, "
            "step halved until L_i changes by < 1e-9 relative; check: the full box [-9, 9]^3 on 257 points per "
            "dimension for the first two subjects",
            **versions(),
            **result,
        }
        path.write_text(json.dumps(nlme, indent=2) + "\n")
        print(f"theoph exact -2LL at nlme's estimates: {result['total_minus2ll']!r}", file=sys.stderr)
    else:
        sys.exit("usage: likelihood.py cases|theoph")


if __name__ == "__main__":
    main()
