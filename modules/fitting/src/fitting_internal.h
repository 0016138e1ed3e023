#pragma once
// Internal helpers of the fitting module (not installed).
#include <cmath>

namespace skerry::fitting_detail {

// One elliptical Gaussian with parameters (A, x0, y0, sa, sb, t); see
// component_gradient() in gaussian_model.cpp for the formulas.
struct GaussEval {
  double A, x0, y0, c, s, ia2, ib2, ia3, ib3, sa, sb;
  explicit GaussEval(const double p[6])
      : A(p[0]), x0(p[1]), y0(p[2]), c(std::cos(p[5])), s(std::sin(p[5])),
        ia2(1.0 / (p[3] * p[3])), ib2(1.0 / (p[4] * p[4])), ia3(ia2 / p[3]), ib3(ib2 / p[4]),
        sa(p[3]), sb(p[4]) {}
  // value g; when grad != nullptr also dg/d(A, x0, y0, sa, sb, t).
  void eval(double x, double y, double& g, double* grad) const {
    const double dx = x - x0, dy = y - y0;
    const double u = dx * c + dy * s, v = -dx * s + dy * c;
    const double e = std::exp(-0.5 * (u * u * ia2 + v * v * ib2));
    g = A * e;
    if (grad) {
      grad[0] = e;
      grad[1] = g * (u * c * ia2 - v * s * ib2);
      grad[2] = g * (u * s * ia2 + v * c * ib2);
      grad[3] = g * u * u * ia3;
      grad[4] = g * v * v * ib3;
      grad[5] = -g * u * v * (ia2 - ib2);
    }
  }
};

}  // namespace skerry::fitting_detail
