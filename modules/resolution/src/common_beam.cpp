// The common beam of several bands: the minimal-area centred ellipse containing
// every beam (method in resolution.h), slightly enlarged.
#include <Eigen/Dense>
#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>

#include "skerry/resolution.h"

namespace skerry {

namespace {

using M2 = Eigen::Matrix2d;

// Smallest eigenvalue of a symmetric 2x2 (closed form).
double min_eig(const M2& a) {
  const double m = 0.5 * (a(0, 0) + a(1, 1));
  const double h = std::hypot(0.5 * (a(0, 0) - a(1, 1)), 0.5 * (a(0, 1) + a(1, 0)));
  return m - h;
}

bool contains_all(const M2& c, const std::vector<M2>& cs) {
  const double tol = 1e-10 * c.trace();
  for (const M2& ci : cs)
    if (min_eig(c - ci) < -tol) return false;
  return true;
}

// Minimal ellipse containing two centred ellipses A and B (resolution.h, step 2).
M2 pair_minimal(const M2& a, const M2& b) {
  Eigen::SelfAdjointEigenSolver<M2> ea(a);
  const M2 ah = ea.operatorSqrt(), ahi = ea.operatorInverseSqrt();
  Eigen::SelfAdjointEigenSolver<M2> eb(ahi * b * ahi);
  Eigen::Vector2d d = eb.eigenvalues();
  for (int k = 0; k < 2; ++k) d(k) = std::max(1.0, d(k));
  const M2 u = eb.eigenvectors();
  M2 c = ah * u * d.asDiagonal() * u.transpose() * ah;
  return 0.5 * (c + c.transpose());
}

// Log-barrier Newton method for max log det P s.t. P <= Q_i (Boyd &
// Vandenberghe 2004, sec. 11.3). Returns C = P^-1.
M2 barrier_minimal(const std::vector<M2>& cs) {
  std::vector<M2> q;
  double qmin = std::numeric_limits<double>::infinity();
  for (const M2& c : cs) {
    q.push_back(c.inverse());
    qmin = std::min(qmin, min_eig(q.back()));
  }
  M2 p = 0.5 * qmin * M2::Identity();
  const M2 e[3] = {(M2() << 1, 0, 0, 0).finished(), (M2() << 0, 1, 1, 0).finished(),
                   (M2() << 0, 0, 0, 1).finished()};
  auto feasible = [&](const M2& pp) {
    if (min_eig(pp) <= 0.0) return false;
    for (const M2& qi : q)
      if (min_eig(qi - pp) <= 0.0) return false;
    return true;
  };
  auto objective = [&](const M2& pp, double t) {
    double f = -t * std::log(pp.determinant());
    for (const M2& qi : q) f -= std::log((qi - pp).determinant());
    return f;
  };
  const double m = 2.0 * static_cast<double>(q.size());
  for (double t = 1.0; m / t > 1e-12; t *= 8.0) {
    for (int it = 0; it < 100; ++it) {
      Eigen::Vector3d g = Eigen::Vector3d::Zero();
      Eigen::Matrix3d h = Eigen::Matrix3d::Zero();
      auto add = [&](const M2& xinv, double wgt, double sign) {
        M2 xe[3];
        for (int a = 0; a < 3; ++a) {
          xe[a] = xinv * e[a];
          g(a) += sign * wgt * xe[a].trace();
        }
        for (int a = 0; a < 3; ++a)
          for (int b = 0; b < 3; ++b) h(a, b) += wgt * (xe[a] * xe[b]).trace();
      };
      add(p.inverse(), t, -1.0);
      for (const M2& qi : q) add((qi - p).inverse(), 1.0, +1.0);
      const Eigen::Vector3d step = -h.ldlt().solve(g);
      const double dec2 = -g.dot(step);  // Newton decrement squared
      if (!(dec2 > 1e-14)) break;
      double s = 1.0;
      const double f0 = objective(p, t);
      M2 dp;
      dp << step(0), step(1), step(1), step(2);
      while (s > 1e-12) {
        const M2 trial = p + s * dp;
        if (feasible(trial) && objective(trial, t) <= f0 - 0.25 * s * dec2) break;
        s *= 0.5;
      }
      if (s <= 1e-12) break;
      p += s * dp;
    }
  }
  return p.inverse();
}

}  // namespace

Beam common_beam(const std::vector<Beam>& beams, const CommonBeamOptions& options) {
  if (beams.empty()) throw std::invalid_argument("common_beam: no beams given");
  if (!(options.enlarge_frac > 0.0) || !std::isfinite(options.enlarge_frac))
    throw std::invalid_argument("common_beam: enlarge_frac must be > 0");
  double scale = 0.0;
  for (const Beam& b : beams) {
    if (!b.valid()) throw std::invalid_argument("common_beam: invalid beam");
    scale = std::max(scale, b.maj_arcsec);
  }
  // Work in units of the largest major axis (well conditioned).
  std::vector<M2> cs;
  for (const Beam& b : beams) {
    Ellipse e = to_ellipse(b);
    e.maj /= scale;
    e.min /= scale;
    cs.push_back(ellipse_to_cov(e));
  }
  M2 best;
  double best_det = std::numeric_limits<double>::infinity();
  auto consider = [&](const M2& c) {
    if (contains_all(c, cs) && c.determinant() < best_det) {
      best = c;
      best_det = c.determinant();
    }
  };
  for (const M2& c : cs) consider(c);
  if (!std::isfinite(best_det))
    for (std::size_t i = 0; i < cs.size(); ++i)
      for (std::size_t j = i + 1; j < cs.size(); ++j) consider(pair_minimal(cs[i], cs[j]));
  if (!std::isfinite(best_det)) {
    best = barrier_minimal(cs);
    best_det = best.determinant();
  }
  const double g = (1.0 + options.enlarge_frac) * (1.0 + options.enlarge_frac);
  const Ellipse out = cov_to_ellipse(best * g);
  return Beam{out.maj * scale, out.min * scale, out.pa_deg};
}

}  // namespace skerry
