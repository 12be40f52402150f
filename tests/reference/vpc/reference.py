#!/usr/bin/env python3
"""Reference values for the visual predictive check (`cistern vpc`), by numpy and scipy alone.

An invented design: 100 subjects, each an intravenous bolus of 100 mg at 0 h and two levels,
at 6 h and 24 h, each with an LLOQ of 0.15 mg/L. The model: CL 4 L/h with a CV of 30 %, V 40 L
with a CV of 20 % (log-normal, uncorrelated; omega^2 = ln(1 + CV^2)), proportional residual
error 15 %. Not a drug, not a patient: a test case.

1. The study's observed levels, drawn here with numpy's own generator (seed 20261203); a
   draw below the LLOQ is written as censored (null).
2. numpy.percentile(..., method="inverted_cdf") of the observed levels at each time (the
   nearest-rank percentile), with censored values as -inf so that they rank lowest; a
   percentile that falls on one is null. And the fraction below the limit.
3. The exact distribution of the simulated percentiles. At a fixed time, the levels of the n
   subjects are independent draws from the predictive distribution
       F(y) = E_eta[ Phi((y - C(eta)) / (0.15 C(eta))) ],  C = 100/V exp(-CL/V t),
   computed by Gauss-Hermite quadrature (80 x 80 nodes). The nearest-rank p-th percentile of n
   levels is the k-th order statistic, k = ceil(p n / 100), and its q-quantile is
   F^-1(beta.ppf(q, k, n + 1 - k)). The interval the check reports (the 5th, 50th and 95th
   percentiles of the percentile over R replicates) converges to these as R grows; the
   Monte-Carlo standard error of a q-quantile of R draws is sqrt(q (1 - q) / R) / g(x_q), with
   g the order statistic's density, beta.pdf(F(x), k, n + 1 - k) f(x). The fraction below the
   limit over the replicates is binomial(n, F(LLOQ)) / n; its q-quantile is binom.ppf / n.

Run from the repository root: python3 tests/reference/vpc/reference.py > tests/reference/vpc/values.json
"""

import json
import math
import platform

import numpy as np
import scipy
from scipy import optimize, stats

DOSE_MG = 100.0
TIMES_H = [6.0, 24.0]
LLOQ_MG_L = 0.15
SUBJECTS = 100
CL, CL_CV = 4.0, 0.3
V, V_CV = 40.0, 0.2
PROPORTIONAL = 0.15
REPLICATES = 2000
SEED = 20261203

W_CL = math.sqrt(math.log(1 + CL_CV**2))
W_V = math.sqrt(math.log(1 + V_CV**2))
NODES, WEIGHTS = np.polynomial.hermite_e.hermegauss(80)
WEIGHTS = WEIGHTS / WEIGHTS.sum()
Z1, Z2 = np.meshgrid(NODES, NODES, indexing="ij")
W2 = np.outer(WEIGHTS, WEIGHTS)


def conc(cl, v, t):
    return DOSE_MG / v * np.exp(-cl / v * t)


def curves(t):
    return conc(CL * np.exp(W_CL * Z1), V * np.exp(W_V * Z2), t)


def cdf(y, t):
    # A curve that underflows to 0 (far nodes, weight below 1e-30) puts its mass at 0.
    c = curves(t)
    safe = np.where(c > 0, c, 1.0)
    terms = np.where(c > 0, stats.norm.cdf((y - safe) / (PROPORTIONAL * safe)), float(y >= 0))
    return float((W2 * terms).sum())


def pdf(y, t):
    c = curves(t)
    safe = np.where(c > 0, c, 1.0)
    s = PROPORTIONAL * safe
    return float((W2 * np.where(c > 0, stats.norm.pdf((y - safe) / s) / s, 0.0)).sum())


def inverse(u, t):
    return optimize.brentq(lambda y: cdf(y, t) - u, -10.0, 50.0, xtol=1e-14, rtol=1e-14)


def monte_carlo_median(t):
    """The predictive median by brute force (10^6 draws), a check of the quadrature."""
    rng = np.random.default_rng(1)
    n = 1_000_000
    c = conc(CL * np.exp(W_CL * rng.standard_normal(n)), V * np.exp(W_V * rng.standard_normal(n)), t)
    return float(np.median(c * (1 + PROPORTIONAL * rng.standard_normal(n))))


def observed_study():
    rng = np.random.default_rng(SEED)
    subjects = []
    for i in range(SUBJECTS):
        cl = CL * math.exp(W_CL * rng.standard_normal())
        v = V * math.exp(W_V * rng.standard_normal())
        levels = []
        for t in TIMES_H:
            c = conc(cl, v, t)
            y = c * (1 + PROPORTIONAL * rng.standard_normal())
            levels.append(None if y < LLOQ_MG_L else float(y))
        subjects.append({"subject": f"S{i + 1:03d}", "conc_mg_l": levels})
    return subjects


def observed_percentiles(values):
    x = np.array([-np.inf if v is None else v for v in values])
    out = {}
    for p in (5, 50, 95):
        q = float(np.percentile(x, p, method="inverted_cdf"))
        out[f"p{p:02d}"] = q if math.isfinite(q) else None
    out["blq_fraction"] = float(np.mean(~np.isfinite(x)))
    return out


def simulated(t):
    n = SUBJECTS
    out = {}
    for p in (5, 50, 95):
        k = math.ceil(p * n / 100)
        entry = {}
        for q, name in ((0.05, "lo"), (0.5, "median"), (0.95, "hi")):
            u = stats.beta.ppf(q, k, n + 1 - k)
            x = inverse(u, t)
            density = stats.beta.pdf(u, k, n + 1 - k) * pdf(x, t)
            se = math.sqrt(q * (1 - q) / REPLICATES) / density
            censored = x < LLOQ_MG_L
            entry[name] = None if censored else x
            entry[f"{name}_mc_se"] = se
        out[f"p{p:02d}"] = entry
    below = cdf(LLOQ_MG_L, t)
    out["below_probability"] = below
    out["blq_fraction"] = {
        name: float(stats.binom.ppf(q, n, below)) / n for q, name in ((0.05, "lo"), (0.5, "median"), (0.95, "hi"))
    }
    return out


def main():
    study = observed_study()
    by_time = []
    for j, t in enumerate(TIMES_H):
        values = [s["conc_mg_l"][j] for s in study]
        by_time.append({"time_h": t, "observed": observed_percentiles(values), "simulated": simulated(t)})
    # The quadrature's accuracy: the total probability and the CDF at a far point.
    checks = {
        "cdf_at_50_mg_l": [cdf(50.0, t) for t in TIMES_H],
        "cdf_below_0": [cdf(-1e-9, t) for t in TIMES_H],
        "median_by_monte_carlo_1e6": [monte_carlo_median(t) for t in TIMES_H],
        "median_by_quadrature": [inverse(0.5, t) for t in TIMES_H],
    }
    print(
        json.dumps(
            {
                "design": {
                    "dose_mg": DOSE_MG,
                    "times_h": TIMES_H,
                    "lloq_mg_l": LLOQ_MG_L,
                    "subjects": SUBJECTS,
                    "replicates": REPLICATES,
                    "model": {
                        "cl_l_h": CL,
                        "cl_cv": CL_CV,
                        "v_l": V,
                        "v_cv": V_CV,
                        "proportional_cv": PROPORTIONAL,
                    },
                },
                "study": study,
                "times": by_time,
                "checks": checks,
                "versions": {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__},
            },
            indent=1,
        )
    )


if __name__ == "__main__":
    # Far quadrature nodes overflow harmlessly (their weight is below 1e-30).
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        main()
