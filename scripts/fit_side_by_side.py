#!/usr/bin/env python3
"""Side by side: cistern's individual fits against a scipy MAP fit and a numpy importance
sampler, on the same sparse subjects, in one run; prints the per-subject medians and ratios.

Run from the repository root after `cargo build --release --examples`:

    python3 scripts/fit_side_by_side.py [SUBJECTS]

It needs numpy and scipy (pip install numpy scipy); the versions are printed. The subjects are
the invented sparse subjects of benches/fit.rs (4-20 one-hour infusions, 2-4 levels each), the
model tests/fixtures/plain_model.toml (CL 4 L/h CV 30 %, V 50 L CV 25 %, correlation 0.3,
residual 0.5 mg/L + 10 %). Both sides are timed per subject on one thread (set the BLAS thread
count to 1), excluding reading the files; the medians are over all subjects and repeats.

- Laplace: scipy.optimize.minimize (BFGS) on the -2 log posterior with its analytic gradient
  from the prior mean, then the Hessian by central differences of the analytic gradient and
  the Laplace covariance 2 H^-1 (what `fit --intervals laplace` reports).
- Posterior: the numpy sampler of the same scheme as src/fit/posterior.rs (a t proposal with
  5 degrees of freedom at the mode with covariance 2 H^-1, 500 draws, refitted to their
  weighted mean and covariance, then 2,000 draws), vectorised over the draws, with weighted
  quantiles and standard deviations of CL, V, k and the half-life; timed alone and with the
  MAP fit before it (cistern's figure includes its MAP fit).

The optima are compared too: cistern's CL and V against scipy's, largest relative difference.
"""

import json
import os
import platform
import subprocess
import sys
import tempfile
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import scipy  # noqa: E402
from scipy.optimize import minimize  # noqa: E402

MODEL = "tests/fixtures/plain_model.toml"
CL_TYP, V_TYP, CL_CV, V_CV, CORR, ADD, PROP = 4.0, 50.0, 0.30, 0.25, 0.3, 0.5, 0.10
NU = 5.0


def subjects(n):
    """The subjects of benches/fit.rs: (dose times, amounts, levels times, levels values)."""
    out = []
    for i in range(n):
        nd = 4 + i % 17
        t = np.array([d * 12.0 + ((d * 37 + i) % 5) * 0.25 for d in range(nd)])
        amt = np.array([750.0 + ((i + d) % 3) * 250.0 for d in range(nd)])
        nl = 2 + i % 3
        lt = np.array([t[-1] - 0.5 + k * 3.5 for k in range(nl)])
        ly = np.array([8.0 + ((i * 13 + k * 7) % 20) for k in range(nl)])
        out.append((t, amt, lt, ly))
    return out


def write_files(subs, directory):
    doses = os.path.join(directory, "doses.csv")
    levels = os.path.join(directory, "levels.csv")
    with open(doses, "w") as d, open(levels, "w") as lv:
        d.write("subject,time_h,amount_mg,route,duration_h\n")
        lv.write("subject,time_h,conc_mg_l\n")
        for i, (t, amt, lt, ly) in enumerate(subs):
            for a, b in zip(t, amt):
                d.write(f"S{i},{float(a)!r},{float(b)!r},infusion,1\n")
            for a, b in zip(lt, ly):
                lv.write(f"S{i},{float(a)!r},{float(b)!r}\n")
    return doses, levels


OMEGA = np.array(
    [
        [np.log1p(CL_CV**2), CORR * np.sqrt(np.log1p(CL_CV**2) * np.log1p(V_CV**2))],
        [CORR * np.sqrt(np.log1p(CL_CV**2) * np.log1p(V_CV**2)), np.log1p(V_CV**2)],
    ]
)
PRECISION = np.linalg.inv(OMEGA)
MEAN = np.array([np.log(CL_TYP), np.log(V_TYP)])


def predictions(theta, t, amt, lt):
    """Concentrations of one-hour infusions by superposition; theta has shape (..., 2): the
    result has shape (..., levels), and d/dtheta with shape (..., levels, 2)."""
    cl = np.exp(theta[..., 0])[..., None, None]
    v = np.exp(theta[..., 1])[..., None, None]
    k = cl / v
    since = lt[:, None] - t[None, :]  # levels x doses
    a = np.clip(since, 0.0, 1.0)  # time infused so far
    b = np.maximum(since - 1.0, 0.0)  # time since the infusion ended
    rate = amt[None, :]  # mg/h over one hour
    e_b, e_ab = np.exp(-k * b), np.exp(-k * (a + b))
    g = e_b - e_ab
    dg = -b * e_b + (a + b) * e_ab  # dg/dk
    c = (rate / cl * g).sum(-1)
    dk = (rate / cl * dg * k).sum(-1)  # dC/dk * k
    return c, np.stack([-c + dk, -dk], -1)


def objective(theta, subject):
    t, amt, lt, ly = subject
    f, df = predictions(theta, t, amt, lt)
    s2 = ADD**2 + (PROP * f) ** 2
    r = ly - f
    eta = theta - MEAN
    value = (np.log(2 * np.pi * s2) + r * r / s2).sum(-1) + np.einsum("...i,ij,...j->...", eta, PRECISION, eta)
    ds2 = 2 * PROP**2 * f
    dterm = ds2 / s2 - 2 * r / s2 - r * r * ds2 / s2**2
    grad = (dterm[..., None] * df).sum(-2) + 2 * eta @ PRECISION
    return value, grad


def laplace_fit(subject):
    res = minimize(objective, MEAN.copy(), args=(subject,), jac=True, method="BFGS", options={"gtol": 1e-6})
    h = 1e-4
    hess = np.empty((2, 2))
    for j in range(2):
        step = np.zeros(2)
        step[j] = h
        hess[:, j] = (objective(res.x + step, subject)[1] - objective(res.x - step, subject)[1]) / (2 * h)
    hess = 0.5 * (hess + hess.T)
    cov = 2 * np.linalg.inv(hess)
    return res.x, hess, cov


def weighted_quantiles(values, weights, ps):
    order = np.argsort(values)
    cum = np.cumsum(weights[order])
    return [values[order][min(np.searchsorted(cum, p), len(values) - 1)] for p in ps]


def sample(subject, mode, hess, rng, draws=2000):
    mean, cov = mode, 2 * np.linalg.inv(hess)
    # The same rounds as cistern's sampler: a first round of a tenth of the draws (at least
    # 200) to adapt the proposal, then the draws; ln q from the variates (Q = (nu/chi2) z'z).
    for m in (max(-(-draws // 10), 200), draws):
        chol = np.linalg.cholesky(cov)
        z = rng.standard_normal((m, 2))
        chi2 = rng.chisquare(NU, m)
        theta = mean + np.sqrt(NU / chi2)[:, None] * (z @ chol.T)
        q = -0.5 * (NU + 2) * np.log1p(np.einsum("ni,ni->n", z, z) / chi2)
        log_w = -0.5 * objective(theta, subject)[0] - q
        w = np.exp(log_w - log_w.max())
        w /= w.sum()
        if m != draws:
            mean = w @ theta
            dev = theta - mean
            cov = (w[:, None] * dev).T @ dev
    ln_k = theta[:, 0] - theta[:, 1]
    out = {}
    for name, x in (("cl", np.exp(theta[:, 0])), ("v", np.exp(theta[:, 1])), ("k", np.exp(ln_k)),
                    ("half_life", np.log(2) / np.exp(ln_k))):
        mu = w @ x
        out[name] = (np.sqrt(w @ (x - mu) ** 2), weighted_quantiles(x, w, (0.025, 0.975)))
    return out


def timed(fn, items, repeats):
    times = []
    results = []
    for r in range(repeats):
        for item in items:
            start = time.perf_counter()
            result = fn(item)
            times.append((time.perf_counter() - start) * 1e6)
            if r == 0:
                results.append(result)
    return np.median(times), results


def tool(doses, levels, intervals, repeats):
    exe = os.path.join("target", "release", "examples", "fit_timing")
    out = subprocess.run([exe, MODEL, doses, levels, intervals, str(repeats)], check=True, capture_output=True,
                         text=True)
    return json.loads(out.stdout)


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    subs = subjects(n)
    print(f"numpy {np.__version__}, scipy {scipy.__version__}, Python {platform.python_version()}; "
          f"{n} subjects; load average {os.getloadavg()[0]:.2f}")
    with tempfile.TemporaryDirectory() as directory:
        doses, levels = write_files(subs, directory)
        ours_laplace = tool(doses, levels, "laplace", 5)
        ours_posterior = tool(doses, levels, "posterior", 1)
    scipy_laplace, fits = timed(laplace_fit, subs, 2)
    rng = np.random.default_rng(1)
    numpy_sampler, _ = timed(lambda a: sample(a[0], a[1][0], a[1][1], rng), list(zip(subs, fits)), 1)
    map_and_sampler, _ = timed(lambda s: sample(s, *laplace_fit(s)[:2], rng), subs, 1)
    ours = np.array(ours_laplace["estimates"])
    theirs = np.exp(np.array([f[0] for f in fits]))
    worst = np.max(np.abs(ours / theirs - 1))
    print(f"optima: largest relative difference of CL or V, cistern against scipy: {worst:.1e}")
    rows = [
        ("MAP + Laplace intervals", ours_laplace["median_us"], "scipy BFGS, analytic gradient", scipy_laplace),
        ("MAP + posterior intervals", ours_posterior["median_us"], "numpy sampler alone", numpy_sampler),
        ("MAP + posterior intervals", ours_posterior["median_us"], "scipy MAP + numpy sampler",
         map_and_sampler),
    ]
    print(f"{'cistern':28} {'median µs':>10}   {'reference':32} {'median µs':>10}   ratio")
    for ours_name, ours_us, ref_name, ref_us in rows:
        print(f"{ours_name:28} {ours_us:10.1f}   {ref_name:32} {ref_us:10.1f}   {ref_us / ours_us:5.1f}x")
    print(f"load average {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
