#pragma once
/// Island decomposition, elliptical-Gaussian fitting in the pixel frame, parameter
/// errors in correlated noise, and sky measurements of fitted components.
///
/// Pure computation: the caller cuts an island out of the background-subtracted
/// image (IslandCutout), fit_island() / fit_islands() return pixel-frame components
/// with covariances, and measure_on_sky() turns one component into sky quantities
/// (RA/Dec, flux densities, FWHMs, PA east of north, deconvolved size) with errors.
///
/// Pixel-frame model of one component (x, y 0-based image pixels):
///   g(x, y) = A exp(-u^2 / (2 sa^2) - v^2 / (2 sb^2)),
///   u =  (x - x0) cos t + (y - y0) sin t,   v = -(x - x0) sin t + (y - y0) cos t,
/// parameters p = (A, x0, y0, sa, sb, t): peak [Jy/beam], centre [pix], the sigmas
/// along and across the axis at angle t [pix], and t [rad] measured from +x
/// towards +y. After the fit each component is normalised so that sa >= sb
/// (sigma_major_pix >= sigma_minor_pix) and t in [0, pi).
///
/// Errors (docs/CONVENTIONS.md "Fitting and errors"): the fit is weighted pixel by
/// pixel with W = 1/rms^2; the covariance is the sandwich
///   V = (J^T W J)^-1 J^T W C W J (J^T W J)^-1,   C_ij = s_i s_j rho(d_ij),
/// with the beam-shaped noise correlation rho(d) = exp(-d^T C_beam^-1 d / 2)
/// (C_beam the beam covariance in pixels; noise made by convolving white noise with
/// a kernel of covariance C_beam / 2 has autocorrelation covariance C_beam). rho is
/// truncated where d^T C_beam^-1 d > correlation_cutoff_sigma^2.
///
/// Which errors are reported: by default the sandwich covariance of the actual
/// weighted fit (it knows the pixels used, the island's edges, the other
/// components and fixed parameters). Condon's (1997) analytic expected errors are
/// always computed too (SkyComponent::condon) and can be reported instead
/// (SkyOptions::use_condon_errors). In the injection tests (point sources, beam
/// 6 x 4 pixels FWHM, correlated noise) the sandwich errors give normalised
/// residuals of unit robust width for every parameter and SNR bin, Condon's
/// correlated-noise forms are off by up to ~25% (they assume a well-sampled
/// beam-sized correlation and no island cut-off).
#include <Eigen/Core>
#include <cstdint>
#include <string_view>
#include <vector>

#include "skerry/background.h"
#include "skerry/image.h"
#include "skerry/islands.h"
#include "skerry/levmar.h"
#include "skerry/sky.h"

namespace skerry {

/// Pixel codes in IslandCutout::mask.
enum : std::uint8_t {
  kCutoutFree = 0,      ///< finite pixel outside the island; usable as fit margin
  kCutoutIsland = 1,    ///< pixel of the island (always fitted)
  kCutoutExcluded = 2,  ///< never used (NaN, zero rms, another island)
};

/// One island, cut out of the background-subtracted image.
struct IslandCutout {
  std::int64_t island_id = 0;  ///< caller's id; fit_islands() output is sorted by it
  int x_origin = 0;            ///< 0-based image column of cutout column 0
  int y_origin = 0;            ///< 0-based image row of cutout row 0
  ImageF data;                 ///< image minus background [Jy/beam], (row, col)
  ImageF rms;                  ///< local rms [Jy/beam], same shape
  MaskU8 mask;                 ///< kCutoutFree / kCutoutIsland / kCutoutExcluded
  /// Restoring beam as a pixel-frame covariance [pix^2] at the island, e.g.
  /// local_geometry(...)->sky_cov_to_pixel(ellipse_to_cov(to_ellipse(beam))).
  Eigen::Matrix2d beam_cov_pix = Eigen::Matrix2d::Zero();
};

/// Cuts one island of `labels` out of (image - background) for fit_island(): the
/// island's bounding box grown by 1 + ceil(margin_beam_sigma * sigma_maj) pixels
/// (sigma_maj the beam's major-axis sigma in pixels, from `beam_cov_pix`) and
/// clipped to the image. A pixel is usable when the image, the background and the
/// rms are finite and rms > 0. Masks: usable island pixels kCutoutIsland, usable
/// pixels of no island kCutoutFree, everything else kCutoutExcluded. Optional
/// outputs: `in_island` (1 on the usable island pixels, cut-out shape) and
/// `mean_rms` (mean rms over them [Jy/beam]; NaN when there is none).
IslandCutout cut_out_island(const ImageF& image, const NoiseMaps& maps, const LabelsI32& labels,
                            const Island& island, const Eigen::Matrix2d& beam_cov_pix,
                            double margin_beam_sigma, MaskU8* in_island = nullptr,
                            double* mean_rms = nullptr);

/// Pixels of an island's flux aperture: the island dilated by a disc of
/// `margin_pix` pixels, without pixels of other islands and without unusable
/// pixels (image, background or rms not finite, rms <= 0). A one-beam margin
/// takes in the emission just below the island's boundary contour that the
/// island's pixel sum misses (common practice for aperture photometry).
struct IslandAperture {
  int x_origin = 0, y_origin = 0;  ///< 0-based image pixel of mask column/row 0
  MaskU8 mask;                     ///< 1 on the aperture's pixels
  ImageF rms;                      ///< local rms [Jy/beam], same shape
  long n_pixels = 0;
  double data_sum = 0.0;   ///< sum of (image - background) [Jy/beam * pixel]
  double model_sum = 0.0;  ///< sum of the components' model [Jy/beam * pixel]
};

/// Which covariance a fit reports in PixelComponent::cov.
enum class ErrorModel {
  kSandwich,  ///< weighted fit corrected for beam-correlated noise (default)
  kWhite,     ///< (J^T W J)^-1, ignoring the noise correlation (under-reports)
};
std::string_view to_string(ErrorModel m);

struct FitOptions {
  /// Largest number of components in one island (local maxima and components
  /// added by the residual search together).
  int max_components = 8;
  /// A local maximum starts a component only if its prominence (peak height minus
  /// the highest saddle connecting it to a higher peak) exceeds this many local
  /// rms. The island's highest maximum always starts one.
  double prominence_snr = 3.0;
  /// Lower bound on both fitted sigmas, as a fraction of the beam's minor-axis
  /// sigma in the pixel frame (docs/CONVENTIONS.md: fitted sizes may go below the beam).
  double min_size_beam_fraction = 0.5;
  /// Fit only amplitude and position, the shape fixed to the beam.
  bool fix_shape_to_beam = false;
  /// Pixels of kCutoutFree within this many beam sigmas (Mahalanobis distance with
  /// C_beam) of an island pixel are added to the fit region. 0 = island only.
  double fit_margin_beam_sigma = 0.0;
  /// Model selection: a fit with k components is kept over k-1 only when its BIC
  /// with effective independent pixels is lower (see fit_island).
  bool use_information_criterion = true;
  /// Residual-driven decomposition after the fit of the island's maxima (see
  /// fit_island): propose added and split components and keep them on the
  /// likelihood-ratio statistic.
  bool residual_search = true;
  /// A whitened residual (data - model) / rms of at least this proposes a
  /// beam-shaped component at its pixel (a proposal only: add_min_lr decides).
  double residual_snr = 4.0;
  /// A component whose variance along its major axis exceeds the beam's in that
  /// direction by more than this fraction is proposed for a split in two.
  double split_min_excess = 0.1;
  /// Smallest likelihood-ratio statistic Lambda (see fit_island) that keeps a
  /// proposed extra component. Calibrated on isolated point sources in
  /// beam-correlated noise (tests/modules/fitting/decomposition_test.cpp).
  double add_min_lr = 25.0;
  /// Noise correlation truncation [beam sigmas].
  double correlation_cutoff_sigma = 4.0;
  ErrorModel error_model = ErrorModel::kSandwich;
  /// Solver settings for island fits: tolerances far below the parameter errors
  /// (a step of 1e-9 of |p| is ~1e-5 pixel for centres near x = 8000).
  LmOptions lm{.max_iterations = 100,
               .step_rel_tol = 1e-9,
               .chi2_rel_tol = 1e-10,
               .gradient_tol = 1e-10,
               .initial_lambda = 1e-3,
               .lambda_up = 10.0,
               .lambda_down = 0.1,
               .max_lambda = 1e12};
};

/// Parameter order in PixelComponent::cov.
enum : int { kParAmp = 0, kParX = 1, kParY = 2, kParSigmaMaj = 3, kParSigmaMin = 4, kParTheta = 5 };

/// Outcome for one component.
enum class ComponentStatus {
  kFitted,          ///< converged Levenberg-Marquardt fit
  kNotConverged,    ///< iteration limit / damping overflow: best parameters kept
  kMoments,         ///< fit failed or rejected: parameters from island moments
  kBadInput,        ///< no usable pixel; parameters NaN
};
std::string_view to_string(ComponentStatus s);

/// Bits of PixelComponent::fit_flags.
enum : std::uint32_t {
  kFitShapeFixed = 1u << 0,     ///< shape held at the beam (fix_shape_to_beam)
  kFitAtSizeBound = 1u << 1,    ///< a sigma ended on its lower or upper bound
  kFitAtPositionBound = 1u << 2,///< the centre ended on the island's bounding box
  kFitSingularCov = 1u << 3,    ///< covariance could not be formed (NaN errors)
  kFitReducedComponents = 1u << 4,///< fewer components kept than maxima found
  kFitMomentsFallback = 1u << 5,///< parameters from moments (status kMoments)
  kFitNotConverged = 1u << 6,   ///< status kNotConverged
  kFitExcludedPixels = 1u << 7, ///< the island touches excluded pixels
  kFitAddedFromResidual = 1u << 8,///< the residual search added or split components in the island
  kFitResidualAtCap = 1u << 9,  ///< significant residual left with max_components fitted
};

/// One Gaussian component in the pixel frame.
struct PixelComponent {
  double amplitude = 0.0;        ///< peak [Jy/beam]
  double x = 0.0, y = 0.0;       ///< centre, 0-based image pixels
  double sigma_major_pix = 0.0;  ///< sigma along the major axis [pix]
  double sigma_minor_pix = 0.0;  ///< sigma along the minor axis [pix]
  double theta_rad = 0.0;        ///< major axis angle from +x towards +y, [0, pi)
  /// Reported covariance of (A, x, y, sigma_major, sigma_minor, theta) per
  /// FitOptions::error_model [Jy/beam, pix, pix, pix, pix, rad]; NaN if singular.
  Eigen::Matrix<double, 6, 6> cov = Eigen::Matrix<double, 6, 6>::Constant(NAN);
  /// The white-noise covariance (J^T W J)^-1, for comparison.
  Eigen::Matrix<double, 6, 6> cov_white = Eigen::Matrix<double, 6, 6>::Constant(NAN);
  double local_rms = 0.0;        ///< rms at the pixel nearest the centre [Jy/beam]
  ComponentStatus status = ComponentStatus::kBadInput;
  std::uint32_t fit_flags = 0;
  int index_in_island = 0;       ///< 0 = brightest fitted peak
};

/// Result for one island.
struct IslandFit {
  std::int64_t island_id = 0;
  std::vector<PixelComponent> components;  ///< by decreasing amplitude
  int n_maxima = 0;           ///< significant maxima found (before the cap)
  int n_fit_pixels = 0;       ///< pixels in the fit region
  double chi2 = 0.0;          ///< sum of whitened squared residuals (white weights)
  int dof = 0;                ///< n_fit_pixels - free parameters
  /// chi2 / dof (NaN when dof <= 0). Each whitened residual has unit variance also
  /// in correlated noise, so a good model gives about 1 (with a larger scatter than
  /// for white noise).
  double reduced_chi2 = 0.0;
  double residual_rms = 0.0;  ///< rms of data - model over the fit region [Jy/beam]
  double beam_area_pix = 0.0; ///< Omega_beam in pixels, 2 pi sqrt(det C_beam)
  LmStatus lm_status = LmStatus::kNotRun;
  int lm_iterations = 0;
  int n_added = 0;              ///< components added (or split off) by the residual search
  bool residual_at_cap = false; ///< whitened residual >= residual_snr left at max_components
};

/// Decompose and fit one island.
///
/// Steps: (1) significant local maxima of the island (8-neighbour maxima with
/// prominence >= prominence_snr local rms; most prominent first, at most
/// max_components); (2) initial guesses: each maximum's height and pixel, the
/// beam's shape (a single component that does not converge is restarted from the
/// island's moments); (3) bounded weighted Levenberg-Marquardt with the analytic
/// Jacobian; (4) for k > 1, fits with k-1, ..., 1 components (dropping the least
/// prominent maxima) are compared by
///   BIC_eff = chi2 / Omega_beam_pix + n_par ln(N_pix / Omega_beam_pix),
/// the Bayesian information criterion (Schwarz 1978, Ann. Stat. 6, 461) with the
/// number of effectively independent pixels N_pix / Omega_beam_pix (docs/CONVENTIONS.md
/// "Noise") and chi2 scaled to it; the lowest wins; (5) covariance per
/// error_model. A fit is unusable on numerical failure or when a component's
/// amplitude dies on its bound; with no usable fit the island gets one
/// moment-based component (status kMoments, flag kFitMomentsFallback).
///
/// Residual search (residual_search, after step 4): blends closer than about a
/// beam show no second maximum, and extended emission needs more Gaussians than
/// it has maxima. From the kept fit, two proposals are made: a beam-shaped
/// component at the island's largest whitened residual (data - model) / rms when
/// it reaches residual_snr, and the split of the component most elongated beyond
/// the beam into two components along its major axis (each as long as the beam,
/// together keeping its flux and second moment). Each is refitted from the
/// current parameters; the better one is kept when
///   Lambda = 2 (chi2_k - chi2_k+1) / Omega_beam_pix >= add_min_lr,
/// a likelihood-ratio statistic in beam-correlated noise (fit_island.cpp says
/// why the factor is 2 / Omega_beam_pix), and the search repeats up to
/// max_components. The threshold is calibrated so that at most about 1 % of
/// isolated point sources are split. With significant residual at the cap the
/// components get kFitResidualAtCap. Every step depends on the island alone, so
/// the result does not depend on threads.
IslandFit fit_island(const IslandCutout& island, const FitOptions& options);

/// Fit many islands in parallel (oneTBB); each island is independent, so the
/// results do not depend on the thread count. Output sorted by island_id
/// (ties keep input order).
std::vector<IslandFit> fit_islands(const std::vector<IslandCutout>& islands,
                                   const FitOptions& options);

/// Model value of a component at 0-based image pixel (x, y) [Jy/beam].
double component_value(const PixelComponent& c, double x, double y);

/// The flux aperture of `island` (see IslandAperture) with its data and the
/// model of `components` summed over it.
IslandAperture island_aperture(const ImageF& image, const NoiseMaps& maps, const LabelsI32& labels,
                               const Island& island, int margin_pix,
                               const std::vector<PixelComponent>& components);

/// Model image (nx x ny) of many fitted components: each component is evaluated
/// (component_value) out to `extent_sigma` major-axis sigmas from its centre and
/// added pixel by pixel, in component order, into float pixels. Rows are split
/// into fixed strips of 64; each strip adds, in component order, the components
/// that reach it, so the sums (and the bytes) do not depend on the thread count.
/// Components without a finite centre, amplitude or extent add nothing.
ImageF render_components(long nx, long ny, const std::vector<PixelComponent>& comps,
                         double extent_sigma = 6.0);

/// Analytic Jacobian of the single-component model at (x, y) with respect to
/// (A, x0, y0, sa, sb, t) (used by the fitter; exposed for tests).
Eigen::Matrix<double, 6, 1> component_gradient(const double p[6], double x, double y);

// ---------------------------------------------------------------------------
// Sky measurements.
// ---------------------------------------------------------------------------

/// Condon (1997, PASP 109, 166) errors of an elliptical Gaussian fit.
struct CondonErrors {
  double peak = 0.0;         ///< sigma_A [same unit as A]
  double maj = 0.0;          ///< sigma of major FWHM [same unit as the FWHMs]
  double min = 0.0;          ///< sigma of minor FWHM
  double x_major = 0.0;      ///< centre error along the major axis
  double y_minor = 0.0;      ///< centre error along the minor axis
  double pa_rad = 0.0;       ///< PA error [rad]
  double s_int_rel = 0.0;    ///< sigma_S / S
  double ra = 0.0;           ///< sigma of RA cos(Dec) (REF-CONDON-03), unit of FWHMs
  double dec = 0.0;          ///< sigma of Dec
};
/// Correlated noise, eqs. 41-42 form (REF-CONDON-02): theta_n2 = bmaj * bmin [unit^2].
CondonErrors condon_errors_correlated(double peak, double rms, double maj, double min,
                                      double pa_deg, double theta_n2);
/// White noise, eq. 21 form (REF-CONDON-01): pixel side h in the FWHMs' unit.
CondonErrors condon_errors_white(double peak, double rms, double maj, double min,
                                 double pa_deg, double h);

/// S_int / S_peak envelope 1 + a SNR^-b above which a component is resolved
/// (REF-RESOLVED-01 functional family; defaults are ours, see SkyOptions).
double resolved_envelope(double snr, double a, double b);

struct SkyOptions {
  /// Fractional flux-scale uncertainty added in quadrature to peak and S_int errors.
  double flux_scale_frac = 0.0;
  /// Astrometric floor added in quadrature to RA and Dec errors [arcsec].
  double astrometric_floor_arcsec = 0.0;
  /// Unresolved when the fitted size is within this many of its own errors of the
  /// beam along an axis (docs/CONVENTIONS.md: about two), or not positive definite.
  double unresolved_nsigma = 2.0;
  /// Resolved by S_int/S_peak > 1 + a SNR^-b (SNR = peak / local rms). Default:
  /// for a beam-sized component Condon (1997) gives sigma(ln S_int/S_peak) =
  /// sqrt(var ln theta_M + var ln theta_m) = sqrt(2) / SNR (REF-CONDON-02 with
  /// theta = theta_N), so a = 3.5, b = 1 is about a one-sided 2.5 sigma envelope
  /// [derived]. REF-RESOLVED-01 lists a published member of the same family.
  double envelope_a = 3.5;
  double envelope_b = 1.0;
  /// Report Condon's expected errors instead of the fit's covariance.
  bool use_condon_errors = false;
};

/// Sky quantities of one component. Errors are 1 sigma.
struct SkyComponent {
  bool valid = false;             ///< false where the WCS has no sky position
  double ra_deg = 0.0, dec_deg = 0.0;          ///< ICRS [deg]
  double ra_err_arcsec = 0.0;     ///< error of RA cos(Dec) [arcsec]
  double dec_err_arcsec = 0.0;    ///< [arcsec]
  double radec_corr = 0.0;        ///< correlation of the RA and Dec errors
  double peak_jy_per_beam = 0.0, peak_err_jy_per_beam = 0.0;
  double s_int_jy = 0.0, s_int_err_jy = 0.0;   ///< apparent integrated flux density
  double maj_arcsec = 0.0, maj_err_arcsec = 0.0;  ///< fitted (convolved) FWHM
  double min_arcsec = 0.0, min_err_arcsec = 0.0;
  double pa_deg = 0.0, pa_err_deg = 0.0;       ///< east of north, [0, 180)
  /// Deconvolved shape. Where an axis is unresolved its value is an upper limit
  /// (the FWHM the deconvolution gives at fitted size + unresolved_nsigma errors).
  double deconv_maj_arcsec = 0.0, deconv_maj_err_arcsec = 0.0;
  double deconv_min_arcsec = 0.0, deconv_min_err_arcsec = 0.0;
  double deconv_pa_deg = 0.0, deconv_pa_err_deg = 0.0;
  bool deconv_maj_upper_limit = false;
  bool deconv_min_upper_limit = false;
  double snr = 0.0;               ///< peak / local rms
  double local_rms_jy_per_beam = 0.0;
  double s_int_over_peak = 0.0;   ///< S_int / S_peak [beam]
  double envelope = 0.0;          ///< 1 + a SNR^-b
  bool resolved = false;          ///< s_int_over_peak > envelope
  double pb = 1.0;                ///< primary-beam value at the position
  double s_int_pbcor_jy = 0.0, s_int_pbcor_err_jy = 0.0;
  double peak_pbcor_jy_per_beam = 0.0, peak_pbcor_err_jy_per_beam = 0.0;
  CondonErrors condon;            ///< Condon (1997) correlated-noise errors, arcsec/Jy
};

/// Turn a pixel-frame component into sky quantities with the image's PixelSky and
/// the local geometry at the component's centre; errors propagated from the full
/// 6x6 covariance through the linearised transform. `pb` is the primary-beam
/// response at the position (1 = none); corrected flux densities divide by it.
SkyComponent measure_on_sky(const PixelComponent& comp, const PixelSky& wcs,
                            const Beam& beam, const SkyOptions& options, double pb = 1.0);

}  // namespace skerry
