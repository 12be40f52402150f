#!/usr/bin/env python3
"""Reference optima for the fitter, computed with scipy, for tests/suite/fit_reference.rs.

Run from the repository root:

    python3 tests/reference/fit_reference.py > tests/reference/fit_reference.json

It needs scipy and numpy (pip install scipy numpy). CI does not run it: the committed JSON is
what the Rust test reads. The script shares no code with cistern: the one-compartment model is
written here again, as the closed-form superposition of one curve per dose, and the objectives
are written from their formulas (docs/methods.md, src/fit/objective.rs's doc comment):

  map: sum_quantified [ln(2 pi s2) + (y - f)^2 / s2] + sum_BLQ -2 ln Phi((LLOQ - f) / s)
       + eta' Omega^-1 eta,   s2 = a^2 + (b f)^2,   eta = theta - ln(typical values),
       over theta = (ln CL, ln V), Omega from omega^2 = ln(1 + CV^2) and the CL-V correlation.
  wls: sum_quantified w (y - f)^2 with w = 1, 1/y or 1/y^2 (levels below the limit left out).

All doses, levels and covariates below are INVENTED test data (a fictional drug); they are
not measurements of anything.
"""

import json
import platform
import sys

import numpy as np
import scipy
from scipy.optimize import least_squares, minimize
from scipy.stats import norm

# ---------------------------------------------------------------------------------------------
# The cases (invented data).

ISSUE_MODEL = {
    # The example model of the issue text: CL 4 L/h (CV 30 %), V 50 L (CV 25 %), residual
    # 0.5 mg/L additive and 10 % proportional; a CL-V correlation of 0.3 added.
    "cl_typical_l_h": 4.0,
    "cl_cv": 0.30,
    "v_typical_l": 50.0,
    "v_cv": 0.25,
    "correlation_cl_v": 0.3,
    "additive_mg_l": 0.5,
    "proportional_cv": 0.10,
    "cl_covariate": None,
    "v_covariate": None,
}


def infusion(t, amount, duration):
    return {"time_h": t, "amount_mg": amount, "route": "infusion", "duration_h": duration}


def bolus(t, amount):
    return {"time_h": t, "amount_mg": amount, "route": "bolus", "duration_h": 0.0}


def oral(t, amount):
    return {"time_h": t, "amount_mg": amount, "route": "oral", "duration_h": 0.0}


def level(t, conc, lloq=None):
    return {"time_h": t, "conc_mg_l": conc, "lloq_mg_l": lloq}


def blq(t, lloq):
    return {"time_h": t, "conc_mg_l": None, "lloq_mg_l": lloq}


CASES = [
    {
        "name": "infusions, three levels",
        "doses": [infusion(0.0, 1000.0, 1.0), infusion(12.0, 1000.0, 1.0), infusion(24.0, 1000.0, 1.0)],
        "levels": [level(25.5, 31.4), level(30.0, 22.9), level(35.8, 14.1)],
        "ka_per_h": None,
        "f": 1.0,
        "model": ISSUE_MODEL,
        "covariates": {},
    },
    {
        "name": "boluses, two levels, proportional error only",
        "doses": [bolus(0.0, 500.0), bolus(8.0, 500.0)],
        "levels": [level(2.0, 8.1), level(14.0, 7.2)],
        "ka_per_h": None,
        "f": 1.0,
        "model": dict(ISSUE_MODEL, additive_mg_l=0.0, proportional_cv=0.15, correlation_cl_v=0.0),
        "covariates": {},
    },
    {
        "name": "infusions, a late level below the limit",
        "doses": [infusion(0.0, 750.0, 2.0), infusion(24.0, 750.0, 2.0)],
        "levels": [level(3.0, 12.6), level(26.5, 14.9), level(36.0, 7.8), blq(80.0, 0.5)],
        "ka_per_h": None,
        "f": 1.0,
        "model": ISSUE_MODEL,
        "covariates": {},
    },
    {
        "name": "below the limit where the prediction is close to it",
        "doses": [infusion(0.0, 500.0, 1.0)],
        "levels": [level(2.0, 8.3), level(12.0, 3.1), blq(30.0, 1.0)],
        "ka_per_h": None,
        "f": 1.0,
        "model": dict(ISSUE_MODEL, additive_mg_l=0.2),
        "covariates": {},
    },
    {
        "name": "oral doses, ka fixed",
        "doses": [oral(0.0, 500.0), oral(12.0, 500.0), oral(24.0, 500.0)],
        "levels": [level(26.0, 9.8), level(31.0, 8.1), level(35.5, 6.2)],
        "ka_per_h": 1.2,
        "f": 0.8,
        "model": dict(ISSUE_MODEL, correlation_cl_v=-0.2),
        "covariates": {},
    },
    {
        "name": "bolus then infusions, four levels, covariate-adjusted prior",
        "doses": [bolus(0.0, 1500.0), infusion(8.0, 500.0, 2.0), infusion(20.0, 1000.0, 1.0)],
        "levels": [level(1.0, 22.8), level(9.5, 17.5), level(19.5, 9.9), level(23.0, 24.0)],
        "ka_per_h": None,
        "f": 1.0,
        "model": dict(
            ISSUE_MODEL,
            cl_covariate={"covariate": "crcl_ml_min", "reference": 100.0, "effect": 0.75},
            v_covariate={"covariate": "weight_kg", "reference": 70.0, "effect": 1.0},
        ),
        "covariates": {"crcl_ml_min": 60.0, "weight_kg": 85.0},
    },
]

WEIGHTINGS = ["none", "1/y", "1/y^2"]

# ---------------------------------------------------------------------------------------------
# The one-compartment model, one closed-form curve per dose, summed (superposition).


def concentrations(cl, v, ka, f_oral, doses, times):
    k = cl / v
    out = np.zeros(len(times))
    for i, t in enumerate(times):
        c = 0.0
        for d in doses:
            s = t - d["time_h"]
            if s < 0.0:
                continue
            if d["route"] == "bolus":
                c += d["amount_mg"] / v * np.exp(-k * s)
            elif d["route"] == "infusion":
                rate = d["amount_mg"] / d["duration_h"]
                on = min(s, d["duration_h"])
                c += rate / (k * v) * (1.0 - np.exp(-k * on)) * np.exp(-k * (s - on))
            elif d["route"] == "oral":
                c += f_oral * d["amount_mg"] * ka / (v * (ka - k)) * (np.exp(-k * s) - np.exp(-ka * s))
            else:
                raise ValueError(d["route"])
        out[i] = c
    return out


def predictions(case, theta):
    times = [l["time_h"] for l in case["levels"]]
    return concentrations(np.exp(theta[0]), np.exp(theta[1]), case["ka_per_h"], case["f"], case["doses"], times)


# ---------------------------------------------------------------------------------------------
# Objectives.


def prior_of(case):
    m = case["model"]
    cl = m["cl_typical_l_h"]
    v = m["v_typical_l"]
    for key, scale in (("cl_covariate", "cl"), ("v_covariate", "v")):
        eff = m[key]
        if eff is not None:
            factor = (case["covariates"][eff["covariate"]] / eff["reference"]) ** eff["effect"]
            if scale == "cl":
                cl *= factor
            else:
                v *= factor
    w_cl = np.log1p(m["cl_cv"] ** 2)
    w_v = np.log1p(m["v_cv"] ** 2)
    cov = m["correlation_cl_v"] * np.sqrt(w_cl * w_v)
    omega = np.array([[w_cl, cov], [cov, w_v]])
    return np.array([np.log(cl), np.log(v)]), np.linalg.inv(omega)


def map_objective(case, theta):
    m = case["model"]
    f = predictions(case, theta)
    total = 0.0
    for lv, fi in zip(case["levels"], f):
        s2 = m["additive_mg_l"] ** 2 + (m["proportional_cv"] * fi) ** 2
        if lv["conc_mg_l"] is not None:
            total += np.log(2.0 * np.pi * s2) + (lv["conc_mg_l"] - fi) ** 2 / s2
        else:
            total += -2.0 * norm.logcdf((lv["lloq_mg_l"] - fi) / np.sqrt(s2))
    mean, precision = prior_of(case)
    eta = np.asarray(theta) - mean
    return total + eta @ precision @ eta


def quantified(case):
    return [i for i, l in enumerate(case["levels"]) if l["conc_mg_l"] is not None]


def wls_residuals(case, weighting, theta):
    idx = quantified(case)
    y = np.array([case["levels"][i]["conc_mg_l"] for i in idx])
    f = predictions(case, theta)[idx]
    w = {"none": np.ones_like(y), "1/y": 1.0 / y, "1/y^2": 1.0 / y**2}[weighting]
    return np.sqrt(w) * (y - f)


def wls_objective(case, weighting, theta):
    r = wls_residuals(case, weighting, theta)
    return float(r @ r)


# ---------------------------------------------------------------------------------------------
# Minimisation, from several starts, polished; the stationarity reached is recorded.


def central_gradient(fun, x, h=1e-6):
    g = np.zeros(len(x))
    for i in range(len(x)):
        e = np.zeros(len(x))
        e[i] = h
        g[i] = (fun(x + e) - fun(x - e)) / (2.0 * h)
    return g


def central_hessian(fun, x, h=1e-4):
    n = len(x)
    hess = np.zeros((n, n))
    for i in range(n):
        e = np.zeros(n)
        e[i] = h
        hess[:, i] = (central_gradient(fun, x + e) - central_gradient(fun, x - e)) / (2.0 * h)
    return 0.5 * (hess + hess.T)


def polish(fun, x):
    """Nelder-Mead with tight tolerances, then BFGS with 3-point differences."""
    nm = minimize(fun, x, method="Nelder-Mead",
                  options={"xatol": 1e-13, "fatol": 1e-15, "maxiter": 20000, "maxfev": 40000})
    bf = minimize(fun, nm.x, method="BFGS", jac="3-point", options={"gtol": 1e-11, "maxiter": 2000})
    return bf.x if fun(bf.x) <= fun(nm.x) else nm.x


def summary(fun, theta):
    g = central_gradient(fun, theta)
    hess = central_hessian(fun, theta)
    step = np.linalg.solve(hess, g)  # the Newton step still left: an estimate of the error in theta
    return {
        "cl_l_h": float(np.exp(theta[0])),
        "v_l": float(np.exp(theta[1])),
        "objective": float(fun(theta)),
        "gradient_max_abs": float(np.max(np.abs(g))),
        "theta_error_estimate": float(np.max(np.abs(step))),
        "hessian_positive_definite": bool(np.all(np.linalg.eigvalsh(hess) > 0.0)),
    }


def unique_best(fun, optima, what):
    """The best of the optima from all starts; stops if another, distinct one is as good (a
    reference value is only meaningful when the optimum is unique)."""
    optima = [x for x in optima if np.isfinite(fun(x))]
    best = min(optima, key=fun)
    for x in optima:
        if np.max(np.abs(x - best)) > 1e-6 and fun(x) - fun(best) < 1e-6 * max(1.0, abs(fun(best))):
            sys.exit(f"{what}: two distinct optima as good as each other: {np.exp(best)} and {np.exp(x)}")
    return best


def fit_map(case):
    mean, _ = prior_of(case)
    fun = lambda th: map_objective(case, th)
    optima = []
    for shift in ([0.0, 0.0], [0.4, -0.3], [-0.4, 0.3], [0.5, 0.5], [-0.5, -0.5], [1.0, -1.0], [-1.0, 1.0]):
        start = mean + np.array(shift)
        bf = minimize(fun, start, method="BFGS", jac="3-point", options={"gtol": 1e-10, "maxiter": 2000})
        optima.append(polish(fun, bf.x))
    return summary(fun, unique_best(fun, optima, case["name"] + ", map"))


def fit_wls(case, weighting):
    fun = lambda th: wls_objective(case, weighting, th)
    optima = []
    for cl0 in (0.2, 0.5, 2.0, 8.0, 30.0):
        for v0 in (5.0, 10.0, 40.0, 150.0, 500.0):
            with np.errstate(over="ignore", invalid="ignore"):  # some far starts wander off
                ls = least_squares(lambda th: wls_residuals(case, weighting, th), np.log([cl0, v0]),
                                   method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=20000)
            optima.append(ls.x)
    best = unique_best(fun, optima, case["name"] + ", wls " + weighting)
    out = summary(fun, best)
    out["max_abs_residual"] = float(np.max(np.abs(wls_residuals(case, weighting, best))))
    return out


def objective_checks(case, map_theta):
    """The objectives at a few fixed points, to check the objective itself, not only its optimum."""
    mean, _ = prior_of(case)
    points = [mean, map_theta, map_theta + np.array([0.3, -0.2]), mean + np.array([-0.6, 0.45])]
    checks = []
    for th in points:
        entry = {"theta": [float(x) for x in th], "map": float(map_objective(case, th))}
        for w in WEIGHTINGS:
            entry["wls " + w] = wls_objective(case, w, th)
        checks.append(entry)
    return checks


def main():
    out_cases = []
    for case in CASES:
        mean, precision = prior_of(case)
        map_fit = fit_map(case)
        map_theta = np.log([map_fit["cl_l_h"], map_fit["v_l"]])
        out_cases.append(dict(
            case,
            prior_mean=[float(x) for x in mean],
            prior_precision=[[float(x) for x in row] for row in precision],
            map=map_fit,
            wls={w: fit_wls(case, w) for w in WEIGHTINGS},
            objective_checks=objective_checks(case, map_theta),
        ))
    doc = {
        "generator": "tests/reference/fit_reference.py",
        "python": platform.python_version(),
        "scipy": scipy.__version__,
        "numpy": np.__version__,
        "note": "Invented test data (a fictional drug); reference optima computed with "
                "scipy.optimize.least_squares (wls) and scipy.optimize.minimize (map).",
        "cases": out_cases,
    }
    json.dump(doc, sys.stdout, indent=1)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
