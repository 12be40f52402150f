"""Independent CWRES and NPDE of a small invented case, from the published definitions.

CWRES: Hooker AC, Staatz CE, Karlsson MO. Pharm Res 2007;24(12):2187-2197 (the FOCE
linearisation around the conditional mode, residual variance at the individual prediction).
NPDE: Brendel K et al. Pharm Res 2006;23(9):2036-2049; Comets E, Brendel K, Mentre F. Comput
Methods Programs Biomed 2008;90(2):154-166 (mean and covariance of simulated data sets,
decorrelation by the symmetric inverse square root, pde by counting, npde = Phi^-1(pde)).

Shares no code with cistern: the one-compartment bolus curve and its derivatives are written
out here. The NPDE come from 400,000 simulations, so their Monte-Carlo error is far below that
of the test's 20,000. Run: python3 reference.py > values.json (numpy 2.x, scipy 1.x).
"""
import json

import numpy as np
from scipy.linalg import sqrtm
from scipy.stats import norm

# Invented case: a 500 mg bolus at 0 h and a 250 mg bolus at 12 h, five levels.
doses = [(0.0, 500.0), (12.0, 250.0)]
times = np.array([1.0, 4.0, 8.0, 13.0, 20.0])
observed = np.array([11.2, 8.1, 6.6, 9.9, 4.2])
typical = np.log([4.0, 40.0])  # ln CL (L/h), ln V (L)
omega = np.array([[0.09, 0.3 * 0.3 * 0.2], [0.3 * 0.3 * 0.2, 0.04]])
additive, proportional = 0.2, 0.1
mode = np.log([3.2, 44.0])  # the conditional mode the CWRES are taken at


def curve(theta, t):
    cl, v = np.exp(theta[0]), np.exp(theta[1])
    k = cl / v
    c = np.zeros_like(t)
    d_lncl = np.zeros_like(t)
    d_lnv = np.zeros_like(t)
    for td, amount in doses:
        dt = t - td
        on = dt >= 0
        ci = np.where(on, amount / v * np.exp(-k * np.clip(dt, 0, None)), 0.0)
        c += ci
        # dC/d ln CL = -C k dt;  dC/d ln V = C (k dt - 1)
        d_lncl += np.where(on, -ci * k * dt, 0.0)
        d_lnv += np.where(on, ci * (k * dt - 1.0), 0.0)
    return c, np.column_stack([d_lncl, d_lnv])


def variance(f):
    return additive**2 + (proportional * f) ** 2


f_hat, g = curve(mode, times)
eta = mode - typical
expected = f_hat - g @ eta
cov = g @ omega @ g.T + np.diag(variance(f_hat))
cwres = np.real(sqrtm(np.linalg.inv(cov))) @ (observed - expected)

rng = np.random.default_rng(20261203)
k_sims = 400_000
etas = rng.multivariate_normal(np.zeros(2), omega, size=k_sims)
sims = np.empty((k_sims, len(times)))
for i in range(k_sims):
    f, _ = curve(typical + etas[i], times)
    sims[i] = f
sims += np.sqrt(variance(sims)) * rng.standard_normal(sims.shape)
mean = sims.mean(axis=0)
cov_sim = np.cov(sims, rowvar=False)
w = np.real(sqrtm(np.linalg.inv(cov_sim)))
obs_star = w @ (observed - mean)
sims_star = (sims - mean) @ w.T
pde = (sims_star < obs_star).mean(axis=0)
pde = np.clip(pde, 0.5 / k_sims, 1 - 0.5 / k_sims)
npde = norm.ppf(pde)

print(json.dumps({
    "doses": [{"time_h": t, "amount_mg": a} for t, a in doses],
    "times_h": times.tolist(),
    "observed_mg_l": observed.tolist(),
    "typical_cl_l_h": 4.0, "typical_v_l": 40.0,
    "omega": omega.tolist(),
    "additive_mg_l": additive, "proportional_cv": proportional,
    "mode_cl_l_h": 3.2, "mode_v_l": 44.0,
    "pred_mg_l": curve(typical, times)[0].tolist(),
    "cwres": cwres.tolist(),
    "npde": npde.tolist(),
    "npde_simulations": k_sims,
}, indent=2))
