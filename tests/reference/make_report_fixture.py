"""Makes report_fixture.json: reference statistics from numpy and scipy for mnemon's report
crate (crates/report/tests/scipy_reference.rs checks them to 1e-9 relative).

Regenerate (from the repository root):
    python3 -m venv /work/stats-venv && /work/stats-venv/bin/pip install numpy scipy
    /work/stats-venv/bin/python tests/reference/make_report_fixture.py

Contents, for fixed small samples (sizes 1 to 13, several not multiples of 4):
- trim_mean: scipy.stats.trim_mean(x, 0.25), the interquartile mean.
- welch: scipy.stats.ttest_ind(x, y, equal_var=False) statistic and p-value, with the
  Welch-Satterthwaite degrees of freedom from the formula.
- improvement: P(X > Y) over all pairs, ties 1/2, with numpy broadcasting.
- exact_bootstrap: two strata of unequal size (4 and 3 scores, 4^4 * 3^3 = 6912
  resamples); every ordered resample drawn with replacement within each stratum is
  enumerated, the statistic is the mean / trim_mean(., 0.25) of the pooled scores of the
  resample, and the interval is numpy.percentile (default linear method) at
  100 * (1 - level) / 2 and 100 * (1 + level) / 2.
"""
import itertools
import json
import os

import numpy as np
import scipy
from scipy import stats

rng = np.random.default_rng(20261203)


def sample(n, scale=10.0):
    # Rounded so the inputs read well in the JSON; the outputs are exact float64.
    return [round(float(v), 3) for v in rng.normal(0.0, scale, size=n) + rng.exponential(scale, size=n)]


trim = []
for n in [1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 13]:
    x = sample(n)
    trim.append(dict(x=x, iqm=float(stats.trim_mean(x, 0.25))))
# Ties and an outlier.
for x in [[1.0, 1.0, 1.0, 2.0, 50.0], [0.0, 0.0, 0.5, 0.5, 0.5, 1.0, 1.0, 100.0, -3.0]]:
    trim.append(dict(x=x, iqm=float(stats.trim_mean(x, 0.25))))

welch = []
for nx, ny in [(2, 2), (3, 5), (5, 6), (7, 4), (10, 13)]:
    x, y = sample(nx), sample(ny, scale=25.0)
    r = stats.ttest_ind(x, y, equal_var=False)
    ax, ay = np.var(x, ddof=1) / nx, np.var(y, ddof=1) / ny
    df = (ax + ay) ** 2 / (ax**2 / (nx - 1) + ay**2 / (ny - 1))
    welch.append(dict(x=x, y=y, t=float(r.statistic), df=float(df), p=float(r.pvalue)))

improvement = []
for nx, ny in [(1, 1), (3, 3), (4, 7), (9, 5)]:
    x, y = sample(nx), sample(ny)
    x[0] = y[0]  # at least one tie
    X, Y = np.array(x)[:, None], np.array(y)[None, :]
    improvement.append(dict(x=x, y=y, p=float(np.mean((X > Y) + 0.5 * (X == Y)))))

strata = [[0.3, 1.2, 2.5, 4.0], [0.0, 0.9, 5.5]]
means, iqms = [], []
for a in itertools.product(strata[0], repeat=len(strata[0])):
    for b in itertools.product(strata[1], repeat=len(strata[1])):
        pooled = list(a) + list(b)
        means.append(np.mean(pooled))
        iqms.append(stats.trim_mean(pooled, 0.25))
exact = []
for level in [0.95, 0.9, 0.5]:
    q = [100 * (1 - level) / 2, 100 * (1 + level) / 2]
    q = [round(v, 10) for v in q]  # 2.5 and 97.5 exactly, as typed
    m, i = np.percentile(means, q), np.percentile(iqms, q)
    exact.append(dict(level=level, resamples=len(means),
                      mean=[float(m[0]), float(m[1])], iqm=[float(i[0]), float(i[1])]))

fixture = dict(
    source="numpy %s, scipy %s; made by tests/reference/make_report_fixture.py"
    % (np.__version__, scipy.__version__),
    trim_mean=trim,
    welch=welch,
    improvement=improvement,
    exact_bootstrap=dict(strata=strata, intervals=exact),
)
out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "report_fixture.json")
with open(out, "w") as f:
    json.dump(fixture, f, indent=1)
    f.write("\n")
print("wrote", out)
