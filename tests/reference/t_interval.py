"""Worked values for mnemon-runs' Student-t interval (crates/runs/src/interval.rs).

Run with a Python that has numpy and scipy: python3 tests/reference/t_interval.py
The printed numbers are pasted into the Rust test beside the name of this script.
"""
import numpy as np
import scipy.stats as st

print("t.ppf(0.975, df):", {df: float(st.t.ppf(0.975, df)) for df in (5, 30, 199)})
print("norm.ppf(0.975):", float(st.norm.ppf(0.975)))
for x in (np.arange(1, 7.0), np.array([2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0] * 4)):
    lo, hi = st.t.interval(0.95, len(x) - 1, loc=x.mean(), scale=st.sem(x))
    print(len(x), "values: 95% interval", float(lo), float(hi))
