#pragma once
/// A general Levenberg-Marquardt solver for small dense nonlinear least-squares
/// problems, on Eigen.
///
/// Minimises chi2(p) = sum_i r_i(p)^2 over p, where the caller's functor returns
/// the (already weighted) residual vector r and, when asked, its Jacobian
/// J = dr/dp. Weighted problems pass r_i = (d_i - m_i(p)) / sigma_i.
///
/// Method (Levenberg 1944, Q. Appl. Math. 2, 164; Marquardt 1963, J. SIAM 11, 431;
/// the damping scaled by diag(J^T J) as in Moré 1978, Numerical Analysis, Springer LNM 630, pp. 105-116, page numbers from memory):
///   (J^T J + lambda D) delta = -J^T r,   D = running maximum over the iterations
///   of diag(J^T J) (floored at 1e-15 of its largest entry),
/// the step is accepted when chi2 decreases, then lambda shrinks; otherwise
/// lambda grows and the step is retried.
///
/// Bounds are handled by projection: a trial point is clamped into [lower, upper]
/// (component by component), and a parameter that sits on a bound while the
/// gradient pushes it outwards is held fixed for that step (a simple active set),
/// so the remaining parameters still move freely. There is no variable transform,
/// so the covariance is that of the untransformed parameters.
///
/// Convergence (any one ends the iteration with a success status):
///   relative step      ||delta|| <= step_rel_tol * (||p|| + step_rel_tol)
///   relative reduction (chi2_old - chi2_new) <= chi2_rel_tol * chi2_old
///   gradient           max_j |(J^T r)_j| * scale_j <= gradient_tol  (projected on
///                      the bounds; scale_j = max(|p_j|, 1) / max(chi2, tiny))
/// A rejected step ends the iteration only when it is itself below the step
/// criterion and does not raise chi2 (the minimum to machine precision).
/// Optionally each step gets a geodesic-acceleration correction (LmOptions).
#include <Eigen/Core>
#include <functional>
#include <string_view>

namespace skerry {

/// Outcome of a solve. Success codes say which criterion stopped the iteration.
enum class LmStatus {
  kNotRun,              ///< solver not called yet
  kConvergedStep,       ///< relative step below step_rel_tol
  kConvergedChi2,       ///< relative chi-square reduction below chi2_rel_tol
  kConvergedGradient,   ///< scaled gradient below gradient_tol
  kMaxIterations,       ///< iteration limit reached (parameters are the best found)
  kDampingOverflow,     ///< lambda exceeded max_lambda without an improving step
  kNumericalFailure,    ///< non-finite residuals or Jacobian at the start point
  kBadInput,            ///< inconsistent sizes, bounds or fewer residuals than parameters
};
/// Stable lower-case name of a status (e.g. "converged_step").
std::string_view to_string(LmStatus s);
/// True for the three converged states.
inline bool lm_converged(LmStatus s) {
  return s == LmStatus::kConvergedStep || s == LmStatus::kConvergedChi2 ||
         s == LmStatus::kConvergedGradient;
}

struct LmOptions {
  int max_iterations = 200;      ///< accepted + rejected steps
  double step_rel_tol = 1e-10;   ///< relative step criterion
  double chi2_rel_tol = 1e-12;   ///< relative chi-square reduction criterion
  double gradient_tol = 1e-12;   ///< scaled gradient criterion
  double initial_lambda = 1e-3;  ///< starting damping
  double lambda_up = 10.0;       ///< factor after a rejected step
  double lambda_down = 0.1;      ///< factor after an accepted step
  double max_lambda = 1e16;      ///< give up beyond this damping
  /// Geodesic acceleration (Transtrum & Sethna 2012, arXiv:1201.5885): a second-
  /// order correction of each step from one extra residual evaluation; steps whose
  /// correction is large (2 |a| / |v| > geodesic_alpha) are rejected. Keeps the
  /// iteration out of the flat valleys of exponential models.
  bool geodesic_acceleration = true;
  double geodesic_alpha = 0.75;
};

/// Residual functor: fill r (size m) at p; when jac != nullptr also fill the m x n
/// Jacobian dr/dp. Return false when the model cannot be evaluated at p (the
/// solver then treats the trial point as worse).
using LmFunctor =
    std::function<bool(const Eigen::VectorXd& p, Eigen::VectorXd& r, Eigen::MatrixXd* jac)>;

struct LmResult {
  LmStatus status = LmStatus::kNotRun;
  Eigen::VectorXd params;      ///< best parameters found
  double chi2 = 0.0;           ///< sum r^2 at params
  double initial_chi2 = 0.0;   ///< sum r^2 at the start point
  int iterations = 0;          ///< steps tried (accepted + rejected)
  int accepted_steps = 0;
  int evaluations = 0;         ///< residual evaluations
  Eigen::MatrixXd jacobian;    ///< J at params (m x n)
  Eigen::VectorXd residuals;   ///< r at params (m)
  /// Parameters on a bound at the end (pass as `fixed` to lm_covariance to exclude them).
  Eigen::Matrix<bool, Eigen::Dynamic, 1> at_bound;
};

/// Solver for one problem of n parameters and m residuals.
class LevenbergMarquardt {
 public:
  explicit LevenbergMarquardt(LmOptions options = {}) : options_(options) {}
  /// Box bounds (use +-infinity for a free side). Empty vectors mean unbounded.
  void set_bounds(const Eigen::VectorXd& lower, const Eigen::VectorXd& upper) {
    lower_ = lower;
    upper_ = upper;
  }
  /// Solve from start point p0 (clamped into the bounds first) with m residuals.
  LmResult solve(const LmFunctor& f, const Eigen::VectorXd& p0, int m) const;

 private:
  LmOptions options_;
  Eigen::VectorXd lower_, upper_;
};

/// Inverse of the normal matrix, (J^T J)^-1, for a J of whitened residuals; the
/// parameter covariance when the weights are 1/sigma_i^2 with correct sigma_i.
/// Parameters flagged in `fixed` (may be empty) get zero rows and columns.
/// Returns false (and a NaN matrix) when J^T J is singular.
bool lm_covariance(const Eigen::MatrixXd& jac, Eigen::MatrixXd& cov,
                   const Eigen::Matrix<bool, Eigen::Dynamic, 1>& fixed = {});

/// Sandwich (robust) covariance of a weighted fit whose whitened residuals have
/// correlation matrix R (R_ij = rho_ij = C_ij / (s_i s_j)):
///   V = (J^T J)^-1 (J^T R J) (J^T J)^-1,
/// which with J the whitened Jacobian is (J^T W J)^-1 J^T W C W J (J^T W J)^-1 for the
/// raw Jacobian (White 1980, Econometrica 48, 817; docs/CONVENTIONS.md "Fitting and errors").
/// `meat` is J^T R J supplied by the caller (it knows R's structure).
bool lm_sandwich_covariance(const Eigen::MatrixXd& jac, const Eigen::MatrixXd& meat,
                            Eigen::MatrixXd& cov,
                            const Eigen::Matrix<bool, Eigen::Dynamic, 1>& fixed = {});

}  // namespace skerry
