// Spectral index, curvature and limits of one source (see spectra.h for the
// conventions). All logarithms are natural.
#include "skerry/spectra.h"

#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <Eigen/Cholesky>
#include <Eigen/Core>
#include <algorithm>
#include <boost/math/special_functions/gamma.hpp>
#include <cmath>
#include <limits>

namespace skerry {

std::string to_string(SpectrumStatus s) {
  switch (s) {
    case SpectrumStatus::Fitted: return "fitted";
    case SpectrumStatus::LimitOnly: return "limit_only";
    case SpectrumStatus::NoData: return "no_data";
  }
  return "unknown";
}

void two_point_alpha(double nu1, double s1, double e1, double nu2, double s2, double e2,
                     double& alpha, double& alpha_err) {
  alpha = alpha_err = std::numeric_limits<double>::quiet_NaN();
  if (!(s1 > 0.0) || !(s2 > 0.0) || !(nu1 > 0.0) || !(nu2 > 0.0) || nu1 == nu2) return;
  // REF-SPIX-01: alpha = ln(S2/S1)/ln(nu2/nu1); first-order propagation of the
  // independent relative errors (Bevington & Robinson 2003, eq. 3.14 form).
  const double lr = std::log(nu2 / nu1);
  alpha = std::log(s2 / s1) / lr;
  alpha_err = std::hypot(e1 / s1, e2 / s2) / std::abs(lr);
}

bool fit_log_polynomial(const std::vector<double>& x, const std::vector<double>& y,
                        const std::vector<double>& w, int degree, std::vector<double>& coef,
                        std::vector<double>& cov, double& chi2) {
  // Weighted linear least squares by the normal equations (REF-SPIX-02/03):
  // minimise sum w_i (y_i - sum_k c_k x_i^k)^2; cov(c) = (A^T W A)^-1.
  const int m = degree + 1;
  const std::size_t n = x.size();
  if (degree < 0 || n < static_cast<std::size_t>(m) || y.size() != n || w.size() != n)
    return false;
  Eigen::MatrixXd N = Eigen::MatrixXd::Zero(m, m);
  Eigen::VectorXd b = Eigen::VectorXd::Zero(m);
  for (std::size_t i = 0; i < n; ++i) {
    Eigen::VectorXd a(m);
    double p = 1.0;
    for (int k = 0; k < m; ++k) {
      a(k) = p;
      p *= x[i];
    }
    N.noalias() += w[i] * a * a.transpose();
    b.noalias() += w[i] * y[i] * a;
  }
  Eigen::LDLT<Eigen::MatrixXd> ldlt(N);
  if (ldlt.info() != Eigen::Success || !ldlt.isPositive()) return false;
  // Reject a (numerically) singular system: smallest pivot relative to largest.
  const Eigen::VectorXd d = ldlt.vectorD();
  if (!(d.minCoeff() > 1e-12 * d.maxCoeff())) return false;
  const Eigen::VectorXd c = ldlt.solve(b);
  const Eigen::MatrixXd C = ldlt.solve(Eigen::MatrixXd::Identity(m, m));
  coef.assign(c.data(), c.data() + m);
  cov.assign(m * m, 0.0);
  for (int r = 0; r < m; ++r)
    for (int s = 0; s < m; ++s) cov[r * m + s] = 0.5 * (C(r, s) + C(s, r));
  chi2 = 0.0;
  for (std::size_t i = 0; i < n; ++i) {
    double model = 0.0, p = 1.0;
    for (int k = 0; k < m; ++k) {
      model += c(k) * p;
      p *= x[i];
    }
    chi2 += w[i] * (y[i] - model) * (y[i] - model);
  }
  return std::isfinite(chi2);
}

namespace {

int distinct_count(std::vector<double> v) {
  std::sort(v.begin(), v.end());
  return static_cast<int>(std::unique(v.begin(), v.end()) - v.begin());
}

}  // namespace

SpectrumResult fit_spectrum(const std::vector<BandFlux>& bands, const SpectraOptions& opt) {
  SpectrumResult r;
  struct Det {
    double nu, s, sig;
  };
  struct Lim {
    double nu, u;
  };
  std::vector<Det> det;
  std::vector<Lim> lim;
  for (const BandFlux& b : bands) {
    const bool ok = std::isfinite(b.freq_hz) && b.freq_hz > 0.0 && std::isfinite(b.flux_jy) &&
                    std::isfinite(b.flux_err_jy) && b.flux_err_jy > 0.0 &&
                    std::isfinite(b.flux_scale_frac) && b.flux_scale_frac >= 0.0;
    if (!ok) {
      r.flags |= kSpecInvalidBand;
      continue;
    }
    ++r.n_bands;
    const double rms = (std::isfinite(b.rms_jy) && b.rms_jy > 0.0) ? b.rms_jy : b.flux_err_jy;
    if (b.flux_jy > 0.0 && b.flux_jy >= opt.detect_snr * rms) {
      // Total error: statistical and this band's flux-scale term in quadrature
      // (independent between bands; spectra.h).
      const double sig = std::hypot(b.flux_err_jy, b.flux_scale_frac * b.flux_jy);
      det.push_back({b.freq_hz, b.flux_jy, sig});
    } else {
      // Upper limit U = limit_snr * rms (common practice); never logged as a value.
      lim.push_back({b.freq_hz, opt.limit_snr * rms});
    }
  }
  r.n_detected = static_cast<int>(det.size());
  r.n_limits = static_cast<int>(lim.size());
  if (!lim.empty()) r.flags |= kSpecHasLimits;

  std::vector<double> nus;
  for (const Det& d : det) nus.push_back(d.nu);
  const int n_freq = distinct_count(nus);

  if (n_freq >= 2) {
    // Weights in ln S: sigma(ln S) = sigma_S / S (first order), w = (S/sigma)^2.
    std::vector<double> x, y, w;
    double sw = 0.0, swx = 0.0;
    for (const Det& d : det) {
      const double wi = (d.s / d.sig) * (d.s / d.sig);
      sw += wi;
      swx += wi * std::log(d.nu);
      w.push_back(wi);
      y.push_back(std::log(d.s));
    }
    // Reference frequency: weighted logarithmic mean (docs/CONVENTIONS.md "Spectra").
    const double ln_nu0 = swx / sw;
    r.ref_freq_hz = std::exp(ln_nu0);
    for (const Det& d : det) x.push_back(std::log(d.nu) - ln_nu0);
    std::vector<double> c, cov;
    double chi2 = 0.0;
    if (fit_log_polynomial(x, y, w, 1, c, cov, chi2)) {
      r.status = SpectrumStatus::Fitted;
      r.alpha = c[1];
      r.alpha_err = std::sqrt(cov[3]);
      r.flux_ref_jy = std::exp(c[0]);
      r.flux_ref_err_jy = r.flux_ref_jy * std::sqrt(cov[0]);
      r.dof_power_law = r.n_detected - 2;
      if (r.dof_power_law >= 1) {
        r.chi2_power_law = chi2;
        // Survival function of chi2 with dof degrees of freedom: Q(dof/2, chi2/2).
        const double p = boost::math::gamma_q(0.5 * r.dof_power_law, 0.5 * chi2);
        if (p < 1e-3) r.flags |= kSpecPoorPowerLaw;
      }
      // Limit bands lying clearly below the power law.
      for (const Lim& l : lim) {
        const double xl = std::log(l.nu) - ln_nu0;
        const double lnS = c[0] + c[1] * xl;
        const double var = cov[0] + 2.0 * xl * cov[1] + xl * xl * cov[3];
        if (lnS - 2.0 * std::sqrt(std::max(var, 0.0)) > std::log(l.u)) r.flags |= kSpecLimitConflict;
      }
    }
    const int need = std::max(3, opt.min_bands_curvature);
    if (r.status == SpectrumStatus::Fitted && r.n_detected >= need && n_freq >= 3) {
      if (fit_log_polynomial(x, y, w, 2, c, cov, chi2)) {
        r.flags |= kSpecCurvatureFitted;
        r.curv_alpha0 = c[1];
        r.curv_alpha0_err = std::sqrt(cov[4]);
        r.curv_q = c[2];
        r.curv_q_err = std::sqrt(cov[8]);
        r.dof_curved = r.n_detected - 3;
        if (r.dof_curved >= 1) r.chi2_curved = chi2;
      }
    }
  }
  if (r.status != SpectrumStatus::Fitted && det.size() >= 1 && n_freq == 1) {
    // One detected frequency: limits on alpha from each limit band,
    // alpha_j = ln(U_j / S_d) / ln(nu_j / nu_d): a limit above nu_d bounds alpha
    // from above, one below nu_d from below. With several detections at the same
    // frequency, the most precise is used.
    const Det* d = &det.front();
    for (const Det& e : det)
      if (e.sig / e.s < d->sig / d->s) d = &e;
    r.ref_freq_hz = d->nu;
    r.flux_ref_jy = d->s;
    r.flux_ref_err_jy = d->sig;
    for (const Lim& l : lim) {
      if (l.nu == d->nu) continue;
      const double a = std::log(l.u / d->s) / std::log(l.nu / d->nu);
      if (l.nu > d->nu)
        r.alpha_upper_limit = std::isnan(r.alpha_upper_limit) ? a : std::min(r.alpha_upper_limit, a);
      else
        r.alpha_lower_limit = std::isnan(r.alpha_lower_limit) ? a : std::max(r.alpha_lower_limit, a);
    }
    if (std::isfinite(r.alpha_upper_limit) || std::isfinite(r.alpha_lower_limit))
      r.status = SpectrumStatus::LimitOnly;
  }
  return r;
}

std::vector<SpectrumResult> fit_spectra(const std::vector<std::vector<BandFlux>>& sources,
                                        const SpectraOptions& options) {
  std::vector<SpectrumResult> out(sources.size());
  tbb::parallel_for(tbb::blocked_range<std::size_t>(0, sources.size(), 256),
                    [&](const tbb::blocked_range<std::size_t>& r) {
                      for (std::size_t i = r.begin(); i != r.end(); ++i)
                        out[i] = fit_spectrum(sources[i], options);
                    });
  return out;
}

}  // namespace skerry
