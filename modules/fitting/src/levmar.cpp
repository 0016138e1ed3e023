// Levenberg-Marquardt with box bounds by projection; see skerry/levmar.h.
#include "skerry/levmar.h"

#include <Eigen/Cholesky>
#include <algorithm>
#include <cmath>
#include <limits>

namespace skerry {

std::string_view to_string(LmStatus s) {
  switch (s) {
    case LmStatus::kNotRun: return "not_run";
    case LmStatus::kConvergedStep: return "converged_step";
    case LmStatus::kConvergedChi2: return "converged_chi2";
    case LmStatus::kConvergedGradient: return "converged_gradient";
    case LmStatus::kMaxIterations: return "max_iterations";
    case LmStatus::kDampingOverflow: return "damping_overflow";
    case LmStatus::kNumericalFailure: return "numerical_failure";
    case LmStatus::kBadInput: return "bad_input";
  }
  return "unknown";
}

namespace {

bool all_finite(const Eigen::VectorXd& v) { return v.allFinite(); }

}  // namespace

LmResult LevenbergMarquardt::solve(const LmFunctor& f, const Eigen::VectorXd& p0, int m) const {
  LmResult res;
  const int n = static_cast<int>(p0.size());
  const bool bounded = lower_.size() > 0 || upper_.size() > 0;
  if (n == 0 || m < n || (bounded && (lower_.size() != n || upper_.size() != n)) ||
      (bounded && (lower_.array() > upper_.array()).any())) {
    res.status = LmStatus::kBadInput;
    res.params = p0;
    return res;
  }
  Eigen::VectorXd lo = bounded ? lower_ : Eigen::VectorXd::Constant(n, -INFINITY);
  Eigen::VectorXd hi = bounded ? upper_ : Eigen::VectorXd::Constant(n, INFINITY);
  auto clamp = [&](Eigen::VectorXd& p) {
    for (int j = 0; j < n; ++j) p(j) = std::clamp(p(j), lo(j), hi(j));
  };

  Eigen::VectorXd p = p0;
  clamp(p);
  Eigen::VectorXd r(m), r_try(m);
  Eigen::MatrixXd J(m, n), J_try(m, n);
  res.at_bound = Eigen::Matrix<bool, Eigen::Dynamic, 1>::Constant(n, false);
  if (!f(p, r, &J) || !all_finite(r) || !J.allFinite()) {
    res.status = LmStatus::kNumericalFailure;
    res.params = p;
    return res;
  }
  double chi2 = r.squaredNorm();
  res.initial_chi2 = chi2;
  double lambda = options_.initial_lambda;
  Eigen::VectorXd dmax = Eigen::VectorXd::Zero(n);  // running maximum of diag(J^T J) (More 1978)
  LmStatus status = LmStatus::kMaxIterations;
  int iter = 0;
  const double tiny = std::numeric_limits<double>::min();

  while (true) {
    const Eigen::MatrixXd A = J.transpose() * J;
    const Eigen::VectorXd g = J.transpose() * r;  // half the gradient of chi2
    // Active set: parameters on a bound whose descent direction points outwards.
    std::vector<int> free_idx;
    free_idx.reserve(n);
    double gmax = 0.0;
    for (int j = 0; j < n; ++j) {
      const bool out_lo = p(j) <= lo(j) && g(j) > 0.0;
      const bool out_hi = p(j) >= hi(j) && g(j) < 0.0;
      if (!(out_lo || out_hi)) {
        free_idx.push_back(j);
        gmax = std::max(gmax, std::abs(g(j)) * std::max(std::abs(p(j)), 1.0));
      }
    }
    if (free_idx.empty() || gmax <= options_.gradient_tol * std::max(chi2, tiny) || chi2 == 0.0) {
      status = LmStatus::kConvergedGradient;
      break;
    }
    const int nf = static_cast<int>(free_idx.size());
    Eigen::MatrixXd Af(nf, nf);
    Eigen::VectorXd gf(nf);
    for (int a = 0; a < nf; ++a) {
      gf(a) = g(free_idx[a]);
      for (int b = 0; b < nf; ++b) Af(a, b) = A(free_idx[a], free_idx[b]);
    }
    for (int j = 0; j < n; ++j) dmax(j) = std::max(dmax(j), A(j, j));
    double dfloor = 0.0;
    for (int a = 0; a < nf; ++a) dfloor = std::max(dfloor, dmax(free_idx[a]));
    dfloor = std::max(dfloor * 1e-15, tiny);

    bool accepted = false;
    while (!accepted) {
      if (iter >= options_.max_iterations) {
        status = LmStatus::kMaxIterations;
        break;
      }
      if (lambda > options_.max_lambda) {
        status = LmStatus::kDampingOverflow;
        break;
      }
      ++iter;
      Eigen::MatrixXd M = Af;
      for (int a = 0; a < nf; ++a) M(a, a) += lambda * std::max(dmax(free_idx[a]), dfloor);
      Eigen::LLT<Eigen::MatrixXd> llt(M);
      if (llt.info() != Eigen::Success) {
        lambda *= options_.lambda_up;
        continue;
      }
      const Eigen::VectorXd df = llt.solve(-gf);
      Eigen::VectorXd p_try = p;
      for (int a = 0; a < nf; ++a) p_try(free_idx[a]) += df(a);
      if (options_.geodesic_acceleration) {
        // Second-order correction along the velocity v = df (Transtrum & Sethna 2012,
        // arXiv:1201.5885, eqs. 13-15): r_vv ~ (2/h) ((r(p + h v) - r) / h - J v),
        // a = -(J^T J + lambda D)^-1 J^T r_vv, step v + a/2, accepted only when
        // 2 |a| / |v| <= alpha (norms scaled by sqrt(D)).
        const double h = 0.1;
        Eigen::VectorXd p_h = p;
        for (int a = 0; a < nf; ++a) p_h(free_idx[a]) += h * df(a);
        Eigen::VectorXd Jv = Eigen::VectorXd::Zero(m);
        for (int a = 0; a < nf; ++a) Jv += J.col(free_idx[a]) * df(a);
        bool ok_h = f(p_h, r_try, nullptr) && all_finite(r_try);
        ++res.evaluations;
        if (ok_h) {
          const Eigen::VectorXd rvv = (2.0 / h) * ((r_try - r) / h - Jv);
          Eigen::VectorXd jr(nf);
          for (int a = 0; a < nf; ++a) jr(a) = J.col(free_idx[a]).dot(rvv);
          const Eigen::VectorXd acc = llt.solve(-jr);
          double na = 0.0, nv = 0.0;
          for (int a = 0; a < nf; ++a) {
            const double dj = std::max(dmax(free_idx[a]), dfloor);
            na += dj * acc(a) * acc(a);
            nv += dj * df(a) * df(a);
          }
          if (2.0 * std::sqrt(na) > options_.geodesic_alpha * std::sqrt(nv)) {
            lambda *= options_.lambda_up;
            continue;
          }
          for (int a = 0; a < nf; ++a) p_try(free_idx[a]) += 0.5 * acc(a);
        }
      }
      clamp(p_try);
      const Eigen::VectorXd step = p_try - p;
      const bool ok = all_finite(p_try) && f(p_try, r_try, &J_try) && all_finite(r_try) &&
                      J_try.allFinite();
      ++res.evaluations;
      const double chi2_try = ok ? r_try.squaredNorm() : INFINITY;
      if (ok && chi2_try < chi2) {
        const double reduction = chi2 - chi2_try;
        const double old_chi2 = chi2;
        p = p_try;
        r.swap(r_try);
        J.swap(J_try);
        chi2 = chi2_try;
        ++res.accepted_steps;
        lambda = std::max(lambda * options_.lambda_down, 1e-15);
        accepted = true;
        if (step.norm() <= options_.step_rel_tol * (p.norm() + options_.step_rel_tol)) {
          status = LmStatus::kConvergedStep;
        } else if (reduction <= options_.chi2_rel_tol * old_chi2) {
          status = LmStatus::kConvergedChi2;
        } else {
          status = LmStatus::kNotRun;  // continue iterating
        }
      } else {
        // A vanishing step that does not improve chi2 means we are at the minimum
        // to machine precision.
        if (ok && step.norm() <= options_.step_rel_tol * (p.norm() + options_.step_rel_tol) &&
            chi2_try <= chi2 * (1.0 + 1e-15)) {
          status = LmStatus::kConvergedStep;
          break;
        }
        lambda *= options_.lambda_up;
      }
    }
    if (!accepted || status != LmStatus::kNotRun) break;
  }
  res.status = status;
  res.params = p;
  res.chi2 = chi2;
  res.iterations = iter;
  res.jacobian = J;
  res.residuals = r;
  const Eigen::VectorXd g = J.transpose() * r;
  for (int j = 0; j < n; ++j)
    res.at_bound(j) = (p(j) <= lo(j) && g(j) >= 0.0) || (p(j) >= hi(j) && g(j) <= 0.0);
  return res;
}

namespace {

// Inverse of a symmetric positive-definite matrix after Jacobi scaling, restricted
// to the parameters not flagged fixed. False when singular to working precision.
bool scaled_inverse(const Eigen::MatrixXd& A, const Eigen::Matrix<bool, Eigen::Dynamic, 1>& fixed,
                    Eigen::MatrixXd& inv) {
  const int n = static_cast<int>(A.rows());
  std::vector<int> idx;
  for (int j = 0; j < n; ++j)
    if (!(fixed.size() == n && fixed(j))) idx.push_back(j);
  inv = Eigen::MatrixXd::Zero(n, n);
  const int k = static_cast<int>(idx.size());
  if (k == 0) return true;
  Eigen::MatrixXd B(k, k);
  Eigen::VectorXd s(k);
  for (int a = 0; a < k; ++a) {
    const double d = A(idx[a], idx[a]);
    if (!(d > 0.0) || !std::isfinite(d)) {
      inv.setConstant(NAN);
      return false;
    }
    s(a) = 1.0 / std::sqrt(d);
  }
  for (int a = 0; a < k; ++a)
    for (int b = 0; b < k; ++b) B(a, b) = A(idx[a], idx[b]) * s(a) * s(b);
  // Cholesky of the unit-diagonal matrix; its pivots bound the conditioning
  // (a pivot below 1e-14 means B is singular to working precision).
  Eigen::LLT<Eigen::MatrixXd> llt(B);
  if (llt.info() != Eigen::Success) {
    inv.setConstant(NAN);
    return false;
  }
  const Eigen::MatrixXd L = llt.matrixL();
  if (!(L.diagonal().array().square().minCoeff() > 1e-14)) {
    inv.setConstant(NAN);
    return false;
  }
  const Eigen::MatrixXd Binv = llt.solve(Eigen::MatrixXd::Identity(k, k));
  for (int a = 0; a < k; ++a)
    for (int b = 0; b < k; ++b) inv(idx[a], idx[b]) = Binv(a, b) * s(a) * s(b);
  return true;
}

}  // namespace

bool lm_covariance(const Eigen::MatrixXd& jac, Eigen::MatrixXd& cov,
                   const Eigen::Matrix<bool, Eigen::Dynamic, 1>& fixed) {
  const Eigen::MatrixXd A = jac.transpose() * jac;
  return scaled_inverse(A, fixed, cov);
}

bool lm_sandwich_covariance(const Eigen::MatrixXd& jac, const Eigen::MatrixXd& meat,
                            Eigen::MatrixXd& cov,
                            const Eigen::Matrix<bool, Eigen::Dynamic, 1>& fixed) {
  Eigen::MatrixXd bread;
  if (!lm_covariance(jac, bread, fixed)) {
    cov = bread;
    return false;
  }
  cov = bread * meat * bread;
  cov = 0.5 * (cov + cov.transpose()).eval();
  return cov.allFinite();
}

}  // namespace skerry
