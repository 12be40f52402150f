"""Independent values of the two rules the diagnostic plots compute (docs/methods.md, 12.5).

Bin medians: the points sorted by x, split by numpy.array_split into B = min(10, n // 5) bins
of consecutive points (sizes differing by at most one, the larger first), and numpy.median of
each bin's x and y. QQ positions: scipy.stats.norm.ppf((i - 0.5) / n), i = 1..n (Hazen).

The scatters are drawn here with a fixed seed and written out with the expected values, so the
test reads its inputs from this file too. Run: python3 reference.py > values.json
(numpy 2.x, scipy 1.x).
"""
import json

import numpy as np
from scipy.stats import norm

rng = np.random.default_rng(20261203)


def bin_medians(x, y):
    order = np.argsort(x, kind="stable")
    bins = min(10, len(x) // 5)
    if bins == 0:
        return []
    return [[float(np.median(x[i])), float(np.median(y[i]))] for i in np.array_split(order, bins)]


scatters = []
for n in [3, 5, 12, 49, 137]:
    x = rng.uniform(0.0, 24.0, n)
    y = rng.normal(0.0, 1.0, n) + 0.05 * x
    scatters.append({"x": x.tolist(), "y": y.tolist(), "medians": bin_medians(x, y)})

scores = {str(n): norm.ppf((np.arange(1, n + 1) - 0.5) / n).tolist() for n in [1, 2, 7, 40, 132]}

print(json.dumps({"scatters": scatters, "normal_scores": scores}, indent=1))
