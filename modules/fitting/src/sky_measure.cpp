// Sky quantities of fitted components and Condon (1997) errors; see skerry/fitting.h.
#include <Eigen/Core>
#include <algorithm>
#include <cmath>

#include "skerry/constants.h"
#include "skerry/fitting.h"
#include "skerry/gaussian.h"

namespace skerry {

namespace {
const double k8Ln2 = 8.0 * kLn2;

void rotate_position_errors(CondonErrors& e, double pa_deg) {
  // REF-CONDON-03: errors along the major/minor axes into (RA cos Dec, Dec), PA
  // east of north: s_ra^2 = s_M^2 sin^2 PA + s_m^2 cos^2 PA,
  //                s_dec^2 = s_M^2 cos^2 PA + s_m^2 sin^2 PA.
  const double s = std::sin(pa_deg * kDegToRad), c = std::cos(pa_deg * kDegToRad);
  e.ra = std::sqrt(e.x_major * e.x_major * s * s + e.y_minor * e.y_minor * c * c);
  e.dec = std::sqrt(e.x_major * e.x_major * c * c + e.y_minor * e.y_minor * s * s);
}
}  // namespace

/// Condon (1997, PASP 109, 166) eqs. 41-42 for a synthesis image whose noise is
/// correlated with FWHM theta_N (REF-CONDON-02):
///   rho^2(aM, am) = (theta_M theta_m / (4 theta_N^2)) [1 + (theta_N/theta_M)^2]^aM
///                   [1 + (theta_N/theta_m)^2]^am A^2 / sigma^2
///   sigma_A^2/A^2 = 2/rho^2(3/2,3/2); sigma_thM^2/thM^2 = 2/rho^2(5/2,1/2);
///   sigma_thm^2/thm^2 = 2/rho^2(1/2,5/2); sigma_x0^2 = sigma_thM^2/(8 ln 2);
///   sigma_y0^2 = sigma_thm^2/(8 ln 2);
///   sigma_phi^2 = 4/rho^2(1/2,5/2) [thM thm / (thM^2 - thm^2)]^2;
///   sigma_S^2/S^2 = sigma_A^2/A^2 + (theta_N^2/(thM thm)) (sigma_thM^2/thM^2 + sigma_thm^2/thm^2).
/// Units: peak and rms alike; FWHMs and theta_n2 in one angular unit (errors in it).
CondonErrors condon_errors_correlated(double peak, double rms, double maj, double min,
                                      double pa_deg, double theta_n2) {
  auto rho2 = [&](double aM, double am) {
    return maj * min / (4.0 * theta_n2) * std::pow(1.0 + theta_n2 / (maj * maj), aM) *
           std::pow(1.0 + theta_n2 / (min * min), am) * peak * peak / (rms * rms);
  };
  const double rA = rho2(1.5, 1.5), rM = rho2(2.5, 0.5), rm = rho2(0.5, 2.5);
  CondonErrors e;
  e.peak = std::abs(peak) * std::sqrt(2.0 / rA);
  e.maj = maj * std::sqrt(2.0 / rM);
  e.min = min * std::sqrt(2.0 / rm);
  e.x_major = e.maj / std::sqrt(k8Ln2);
  e.y_minor = e.min / std::sqrt(k8Ln2);
  const double ell = maj * min / (maj * maj - min * min);
  e.pa_rad = std::sqrt(4.0 / rm) * std::abs(ell);
  e.s_int_rel = std::sqrt(2.0 / rA + theta_n2 / (maj * min) * (2.0 / rM + 2.0 / rm));
  rotate_position_errors(e, pa_deg);
  return e;
}

/// Condon (1997) eq. 21 for uncorrelated noise with pixel side h (REF-CONDON-01):
///   rho^2 = (pi / (8 ln 2)) theta_M theta_m A^2 / (h^2 sigma^2);
///   relative errors of A, theta_M, theta_m and S all sqrt(2/rho^2);
///   sigma_x0^2 = theta_M^2/(8 ln 2) 2/rho^2, sigma_y0^2 = theta_m^2/(8 ln 2) 2/rho^2;
///   sigma_phi^2 = (4/rho^2) [thM thm / (thM^2 - thm^2)]^2.
CondonErrors condon_errors_white(double peak, double rms, double maj, double min,
                                 double pa_deg, double h) {
  const double r2 = kPi / k8Ln2 * maj * min * peak * peak / (h * h * rms * rms);
  const double rel = std::sqrt(2.0 / r2);
  CondonErrors e;
  e.peak = std::abs(peak) * rel;
  e.maj = maj * rel;
  e.min = min * rel;
  e.x_major = maj / std::sqrt(k8Ln2) * rel;
  e.y_minor = min / std::sqrt(k8Ln2) * rel;
  e.pa_rad = std::sqrt(4.0 / r2) * std::abs(maj * min / (maj * maj - min * min));
  e.s_int_rel = rel;
  rotate_position_errors(e, pa_deg);
  return e;
}

/// 1 + a SNR^-b (REF-RESOLVED-01 family).
double resolved_envelope(double snr, double a, double b) { return 1.0 + a * std::pow(snr, -b); }

namespace {

// Sky quantities as a function of the pixel parameters, with the local geometry
// held fixed (linearisation about the fitted centre).
enum : int {
  kQEast = 0, kQNorth, kQPeak, kQSint, kQMaj, kQMin, kQPa, kQDMaj, kQDMin, kQDPa, kNQ
};
using QVec = Eigen::Matrix<double, kNQ, 1>;

struct SkyMap {
  Eigen::Matrix2d J;
  double x_ref, y_ref;
  Ellipse beam;
  QVec operator()(const Eigen::Matrix<double, 6, 1>& p) const {
    QVec q;
    const Eigen::Vector2d en = J * Eigen::Vector2d(p(1) - x_ref, p(2) - y_ref);
    q(kQEast) = en(0);
    q(kQNorth) = en(1);
    const double c = std::cos(p(5)), s = std::sin(p(5));
    Eigen::Matrix2d R;
    R << c, -s, s, c;
    const Eigen::Matrix2d Cpix =
        R * Eigen::Vector2d(p(3) * p(3), p(4) * p(4)).asDiagonal() * R.transpose();
    // Sky covariance of the component [arcsec^2] (sigma^2), J C J^T; as FWHMs and
    // PA east of north via cov_to_ellipse (covariance = FWHM^2 / (8 ln 2)).
    const Ellipse e = cov_to_ellipse(J * Cpix * J.transpose());
    q(kQPeak) = p(0);
    // REF-SINT-01: S_int = S_peak theta_M theta_m / (bmaj bmin) [Jy].
    q(kQSint) = p(0) * e.maj * e.min / (beam.maj * beam.min);
    q(kQMaj) = e.maj;
    q(kQMin) = e.min;
    q(kQPa) = e.pa_deg;
    const Deconvolved d = deconvolve(e, beam);
    q(kQDMaj) = d.shape.maj;
    q(kQDMin) = d.shape.min;
    q(kQDPa) = d.shape.pa_deg;
    return q;
  }
};

double wrap_pa_diff(double d) {  // into (-90, 90]
  d = std::fmod(d, 180.0);
  if (d > 90.0) d -= 180.0;
  if (d <= -90.0) d += 180.0;
  return d;
}

}  // namespace

SkyComponent measure_on_sky(const PixelComponent& comp, const PixelSky& wcs, const Beam& beam,
                            const SkyOptions& opt, double pb) {
  SkyComponent out;
  const bool finite_params = std::isfinite(comp.amplitude) && std::isfinite(comp.x) &&
                             std::isfinite(comp.y) && comp.sigma_major_pix > 0.0 &&
                             comp.sigma_minor_pix > 0.0 && std::isfinite(comp.theta_rad);
  if (!finite_params || !beam.valid()) return out;
  const auto geo = local_geometry(wcs, comp.x, comp.y);
  if (!geo || !wcs.pix_to_sky(comp.x, comp.y, out.ra_deg, out.dec_deg)) return out;
  out.valid = true;

  SkyMap map{geo->jac_arcsec_per_pix, comp.x, comp.y, to_ellipse(beam)};
  Eigen::Matrix<double, 6, 1> p;
  p << comp.amplitude, comp.x, comp.y, comp.sigma_major_pix, comp.sigma_minor_pix, comp.theta_rad;
  const QVec q = map(p);

  // Linear propagation V_q = G V_p G^T, G by central differences with steps of
  // 1e-4 of each parameter's error (truncation error ~1e-8 relative).
  Eigen::Matrix<double, 6, 6> V = comp.cov;
  bool theta_undefined = !std::isfinite(V(5, 5));
  bool have_cov = true;
  for (int a = 0; a < 6; ++a)
    for (int b = 0; b < 6; ++b)
      if (!std::isfinite(V(a, b))) {
        if (a == 5 || b == 5) {
          V(a, b) = 0.0;
        } else {
          have_cov = false;
        }
      }
  Eigen::Matrix<double, kNQ, 6> G = Eigen::Matrix<double, kNQ, 6>::Zero();
  if (have_cov) {
    const double scale[6] = {std::abs(comp.amplitude), 1.0, 1.0, comp.sigma_minor_pix,
                             comp.sigma_minor_pix, 1.0};
    for (int j = 0; j < 6; ++j) {
      double h = 1e-4 * std::sqrt(std::max(V(j, j), 0.0));
      if (!(h > 1e-9 * scale[j])) h = 1e-7 * scale[j];
      Eigen::Matrix<double, 6, 1> pp = p, pm = p;
      pp(j) += h;
      pm(j) -= h;
      const QVec qp = map(pp), qm = map(pm);
      QVec dq = qp - qm;
      dq(kQPa) = wrap_pa_diff(dq(kQPa));
      dq(kQDPa) = wrap_pa_diff(dq(kQDPa));
      G.col(j) = dq / (2.0 * h);
    }
  }
  const Eigen::Matrix<double, kNQ, kNQ> Vq =
      have_cov ? Eigen::Matrix<double, kNQ, kNQ>(G * V * G.transpose())
               : Eigen::Matrix<double, kNQ, kNQ>::Constant(NAN);
  auto sd = [&](int i) { return std::sqrt(std::max(Vq(i, i), 0.0)) + (have_cov ? 0.0 : NAN); };

  out.peak_jy_per_beam = q(kQPeak);
  out.s_int_jy = q(kQSint);
  out.maj_arcsec = q(kQMaj);
  out.min_arcsec = q(kQMin);
  out.pa_deg = wrap_pa_180(q(kQPa));
  out.local_rms_jy_per_beam = comp.local_rms;
  out.snr = comp.amplitude / comp.local_rms;
  out.condon = condon_errors_correlated(comp.amplitude, comp.local_rms, out.maj_arcsec,
                                        out.min_arcsec, out.pa_deg, beam.maj_arcsec * beam.min_arcsec);
  double ra_err, dec_err, corr, peak_err, sint_err, maj_err, min_err, pa_err;
  if (opt.use_condon_errors) {
    ra_err = out.condon.ra;
    dec_err = out.condon.dec;
    const double s = std::sin(out.pa_deg * kDegToRad), c = std::cos(out.pa_deg * kDegToRad);
    const double cxy = (out.condon.x_major * out.condon.x_major -
                        out.condon.y_minor * out.condon.y_minor) * s * c;
    corr = cxy / (ra_err * dec_err);
    peak_err = out.condon.peak;
    sint_err = out.condon.s_int_rel * std::abs(out.s_int_jy);
    maj_err = out.condon.maj;
    min_err = out.condon.min;
    pa_err = out.condon.pa_rad * kRadToDeg;
  } else {
    ra_err = sd(kQEast);
    dec_err = sd(kQNorth);
    corr = Vq(kQEast, kQNorth) / (ra_err * dec_err);
    peak_err = sd(kQPeak);
    sint_err = sd(kQSint);
    maj_err = sd(kQMaj);
    min_err = sd(kQMin);
    pa_err = theta_undefined ? NAN : sd(kQPa);
  }
  // Systematic terms in quadrature (options; common practice, cf. REF-CONDON-03 notes).
  const double f = opt.flux_scale_frac, a = opt.astrometric_floor_arcsec;
  out.ra_err_arcsec = std::sqrt(ra_err * ra_err + a * a);
  out.dec_err_arcsec = std::sqrt(dec_err * dec_err + a * a);
  out.radec_corr = corr * ra_err * dec_err / (out.ra_err_arcsec * out.dec_err_arcsec);
  if (!std::isfinite(out.radec_corr)) out.radec_corr = 0.0;
  out.peak_err_jy_per_beam = std::hypot(peak_err, f * out.peak_jy_per_beam);
  out.s_int_err_jy = std::hypot(sint_err, f * out.s_int_jy);
  out.maj_err_arcsec = maj_err;
  out.min_err_arcsec = min_err;
  out.pa_err_deg = pa_err;

  // Deconvolution (REF-DECONV-01, Wild 1970): an axis is resolved when C_fit -
  // C_beam is positive along it also after shrinking the fitted FWHMs by
  // unresolved_nsigma errors; otherwise it is an upper limit, the deconvolved size
  // at FWHMs enlarged by unresolved_nsigma errors (docs/CONVENTIONS.md "Fitting and errors").
  const Ellipse be = to_ellipse(beam);
  const double ns = opt.unresolved_nsigma;
  const double me = std::isfinite(maj_err) ? maj_err : 0.0, mi = std::isfinite(min_err) ? min_err : 0.0;
  const Deconvolved d0 = deconvolve({out.maj_arcsec, out.min_arcsec, out.pa_deg}, be);
  const Deconvolved dlo = deconvolve(
      {std::max(out.maj_arcsec - ns * me, 0.0), std::max(out.min_arcsec - ns * mi, 0.0), out.pa_deg},
      be);
  const Deconvolved dhi =
      deconvolve({out.maj_arcsec + ns * me, out.min_arcsec + ns * mi, out.pa_deg}, be);
  const bool res_maj = d0.resolved_major && dlo.resolved_major;
  const bool res_min = d0.resolved_minor && dlo.resolved_minor;
  out.deconv_maj_upper_limit = !res_maj;
  out.deconv_min_upper_limit = !res_min;
  out.deconv_maj_arcsec = res_maj ? d0.shape.maj : dhi.shape.maj;
  out.deconv_min_arcsec = res_min ? d0.shape.min : dhi.shape.min;
  out.deconv_maj_err_arcsec = res_maj ? sd(kQDMaj) : NAN;
  out.deconv_min_err_arcsec = res_min ? sd(kQDMin) : NAN;
  out.deconv_pa_deg = res_maj ? d0.shape.pa_deg : (dhi.resolved_major ? dhi.shape.pa_deg : NAN);
  out.deconv_pa_err_deg = (res_maj && !theta_undefined) ? sd(kQDPa) : NAN;

  // Resolved/unresolved from S_int/S_peak against 1 + a SNR^-b (REF-RESOLVED-01 family).
  out.s_int_over_peak = out.s_int_jy / out.peak_jy_per_beam;
  out.envelope = resolved_envelope(out.snr, opt.envelope_a, opt.envelope_b);
  out.resolved = out.s_int_over_peak > out.envelope;

  // Primary beam: corrected = apparent / pb (pb in (0, 1]).
  out.pb = pb;
  out.s_int_pbcor_jy = out.s_int_jy / pb;
  out.s_int_pbcor_err_jy = out.s_int_err_jy / pb;
  out.peak_pbcor_jy_per_beam = out.peak_jy_per_beam / pb;
  out.peak_pbcor_err_jy_per_beam = out.peak_err_jy_per_beam / pb;
  return out;
}

}  // namespace skerry
