#!/usr/bin/env python3
"""Reference fit of one stamp with scipy.optimize.least_squares (Debian python3-scipy).

Usage: scipy_stamp_fit.py STAMP.txt
STAMP.txt: first line "A x0 y0 sa sb t" (start point), then one line per fitted
pixel "x y data weight" (weight = 1 / rms). Model (pixel frame, 0-based pixels):
  g = A exp(-u^2 / (2 sa^2) - v^2 / (2 sb^2)),
  u = (x - x0) cos t + (y - y0) sin t,  v = -(x - x0) sin t + (y - y0) cos t.
Residuals w (data - g); Jacobian by scipy's own 3-point differences, so nothing of
the C++ side's analytic derivatives is shared. Prints the solution (sa >= sb,
t in [0, pi)) as six numbers at full precision.
"""
import sys

import numpy as np
from scipy.optimize import least_squares


def main():
    with open(sys.argv[1]) as f:
        p0 = np.array([float(v) for v in f.readline().split()])
    x, y, d, w = np.loadtxt(sys.argv[1], skiprows=1, unpack=True)

    def resid(p):
        a, x0, y0, sa, sb, t = p
        c, s = np.cos(t), np.sin(t)
        u = (x - x0) * c + (y - y0) * s
        v = -(x - x0) * s + (y - y0) * c
        return w * (d - a * np.exp(-0.5 * (u * u / sa**2 + v * v / sb**2)))

    r = least_squares(resid, p0, jac="3-point", method="trf", x_scale="jac",
                      ftol=1e-15, xtol=1e-15, gtol=1e-15, max_nfev=20000)
    a, x0, y0, sa, sb, t = r.x
    if sb > sa:
        sa, sb, t = sb, sa, t + np.pi / 2
    t = np.mod(t, np.pi)
    print(" ".join(repr(float(v)) for v in (a, x0, y0, sa, sb, t)))
    return 0 if r.success else 1


if __name__ == "__main__":
    sys.exit(main())
