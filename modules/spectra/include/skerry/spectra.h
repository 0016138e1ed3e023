#pragma once
/// Radio spectra of one source from flux densities in several bands: power-law
/// spectral index, log-parabola curvature, limits.
///
/// Conventions (docs/CONVENTIONS.md "Spectra"):
///  - S proportional to nu^alpha (steep spectra have negative alpha).
///  - All logarithms here are NATURAL. The curvature q is the coefficient of the
///    natural-log parabola  ln S = ln S0 + alpha0 ln(nu/nu0) + q [ln(nu/nu0)]^2 ;
///    a base-10 curvature c2 (log S = c0 + c1 X + c2 X^2, X = log(nu/nu0)) is
///    q * ln 10 (REF-SPIX-03, Massaro et al. 2004, A&A 413, 489).
///  - The reference frequency nu0 is the weighted logarithmic mean of the bands
///    used in the fit, ln nu0 = sum(w ln nu) / sum(w), w = 1/sigma^2(ln S); at nu0
///    the power-law intercept and slope are uncorrelated. It is reported.
///  - Flux-scale uncertainty: a fractional calibration error f_i per band, added in
///    quadrature to the statistical error of that band, sigma_i^2 = sigma_stat^2 +
///    (f_i S_i)^2. It is treated as INDEPENDENT between bands (each band is
///    calibrated on its own), so it widens the error of alpha; a scale error common
///    to all bands would cancel in alpha and is not modelled.
///  - A band is a detection when S >= detect_snr * rms (rms = the band's noise on
///    the flux density scale, BandFlux::rms_jy); otherwise it is an upper limit
///    U = limit_snr * rms (common practice). Forced flux densities
///    may be zero or negative: they are never logged; only detections enter fits.
#include <cmath>
#include <cstdint>
#include <string>
#include <vector>

namespace skerry {

/// One band's measurement of one source.
struct BandFlux {
  double freq_hz = 0.0;        ///< observing frequency [Hz], > 0
  double flux_jy = 0.0;        ///< flux density [Jy]; may be <= 0 (forced measurement)
  double flux_err_jy = 0.0;    ///< statistical 1-sigma error of flux_jy [Jy], > 0
  /// Noise used for the detection test and the upper limit [Jy]; <= 0 or NaN means
  /// "use flux_err_jy".
  double rms_jy = 0.0;
  double flux_scale_frac = 0.0;  ///< fractional flux-scale uncertainty of this band (e.g. 0.03)
};

struct SpectraOptions {
  double detect_snr = 3.0;  ///< a band is detected when S >= detect_snr * rms
  double limit_snr = 3.0;   ///< upper limit of a non-detection: U = limit_snr * rms [Jy]
  /// Fit the log-parabola when at least this many bands are detected (>= 3).
  int min_bands_curvature = 3;
};

/// Status of a spectrum (a value is produced for every status except NoData).
enum class SpectrumStatus : int {
  Fitted = 0,        ///< alpha from >= 2 detected bands
  LimitOnly = 1,     ///< fewer than 2 detections: only limits on alpha (if any)
  NoData = 2,        ///< no usable band (nothing detected, nothing constraining)
};
std::string to_string(SpectrumStatus s);

/// Flags (bits, combined).
enum SpectrumFlag : std::uint32_t {
  kSpecHasLimits = 1u << 0,        ///< at least one band is an upper limit
  kSpecPoorPowerLaw = 1u << 1,     ///< power-law chi2 p-value < 0.001 (dof >= 1)
  kSpecCurvatureFitted = 1u << 2,  ///< q and its error are set
  kSpecLimitConflict = 1u << 3,    ///< a limit band lies below the fitted power law by > 2 sigma
  kSpecInvalidBand = 1u << 4,      ///< a band had a non-finite value or error and was ignored
};

struct SpectrumResult {
  SpectrumStatus status = SpectrumStatus::NoData;
  std::uint32_t flags = 0;
  int n_bands = 0;       ///< bands given (valid ones)
  int n_detected = 0;    ///< bands used in the fits
  int n_limits = 0;      ///< bands that are upper limits

  double ref_freq_hz = NAN;    ///< nu0: weighted logarithmic mean of the detected bands [Hz]
  // Power law S = S0 (nu/nu0)^alpha.
  double alpha = NAN;          ///< spectral index (S ~ nu^alpha)
  double alpha_err = NAN;      ///< 1-sigma formal error (not scaled by chi2)
  double flux_ref_jy = NAN;    ///< S0 = S(nu0) [Jy]
  double flux_ref_err_jy = NAN;///< 1-sigma error of S0 [Jy] (first order: S0 sigma(ln S0))
  double chi2_power_law = NAN; ///< chi2 of the power law (NaN with 2 bands)
  int dof_power_law = 0;       ///< n_detected - 2
  // Log-parabola ln S = ln S0 + alpha0 x + q x^2, x = ln(nu/nu0), same nu0.
  double curv_alpha0 = NAN;    ///< local index at nu0 from the log-parabola
  double curv_alpha0_err = NAN;
  double curv_q = NAN;         ///< curvature q (natural log; c2 base 10 = q ln 10)
  double curv_q_err = NAN;
  double chi2_curved = NAN;    ///< chi2 of the log-parabola (NaN with 3 bands: 0 dof)
  int dof_curved = 0;          ///< n_detected - 3 (when fitted)
  // Limits on alpha from detections and limit bands (NaN when none).
  double alpha_upper_limit = NAN;  ///< alpha < this (a limit band above the detected ones in nu)
  double alpha_lower_limit = NAN;  ///< alpha > this (a limit band below in nu)
};

/// Two-point spectral index and its first-order error (REF-SPIX-01; Bevington &
/// Robinson 2003, Data Reduction and Error Analysis, ch. 3 error propagation):
///   alpha = ln(S2/S1)/ln(nu2/nu1),
///   sigma_alpha = sqrt((s1/S1)^2 + (s2/S2)^2) / |ln(nu2/nu1)|.
/// Needs S1, S2 > 0 and nu1 != nu2 (NaN otherwise).
void two_point_alpha(double nu1_hz, double s1_jy, double e1_jy, double nu2_hz, double s2_jy,
                     double e2_jy, double& alpha, double& alpha_err);

/// Fit one source's spectrum. Bands with non-finite values are ignored (flagged).
SpectrumResult fit_spectrum(const std::vector<BandFlux>& bands, const SpectraOptions& options = {});

/// Fit many spectra (one vector of bands per source), in parallel; the result
/// order is the input order and does not depend on the thread count.
std::vector<SpectrumResult> fit_spectra(const std::vector<std::vector<BandFlux>>& sources,
                                        const SpectraOptions& options = {});

/// Low-level weighted polynomial fit in natural-log space, for tests and maps:
/// y_i = ln S_i fitted as sum_k c_k x_i^k, x_i = ln(nu_i/nu0), weights w_i =
/// 1/sigma^2(y_i); returns false when singular. cov is (degree+1)^2 row-major.
bool fit_log_polynomial(const std::vector<double>& x, const std::vector<double>& y,
                        const std::vector<double>& w, int degree, std::vector<double>& coef,
                        std::vector<double>& cov, double& chi2);

}  // namespace skerry
