#pragma once
/// Forced (fixed-position, fixed-shape) flux densities in one image, and median
/// stacking at given positions.
///
/// Model: at each component's sky position (projected into this image's own
/// pixel grid through its PixelSky), a Gaussian whose shape is the component's
/// intrinsic (deconvolved) shape convolved with this image's beam, both turned
/// into the pixel frame with the local WCS Jacobian (skerry/sky.h
/// local_geometry). Only the peak amplitudes a_k [Jy/beam] are free; components
/// whose model footprints overlap (within `blend_radius_sigma`) form one group
/// fitted together by linear weighted least squares, weights 1/rms^2 from the rms
/// map. Integrated flux density S_k = a_k sqrt(det C_conv / det C_beam) =
/// a_k (M m)/(b_M b_m) (docs/CONVENTIONS.md "Fitting and errors").
///
/// Error: the noise of a restored image is correlated with the beam's shape
/// (docs/CONVENTIONS.md "Noise"), so the covariance of the weighted least-squares
/// amplitudes is the sandwich form (G^T W G)^-1 G^T W N W G (G^T W G)^-1 (N the
/// pixel noise covariance). G^T W G is summed over the pixels; G^T W N W G is
/// evaluated in closed form in the continuous limit (pixel units):
///   sum_ij g_k(i) g_l(j) rho_ij / (s_k s_l) = (2 pi)^2 sqrt(det Ck det Cl det Cb /
///   det(Ck+Cl+Cb)) exp(-d^T (Ck+Cl+Cb)^-1 d / 2) / (s_k s_l),
/// with rho the beam-shaped noise correlation (covariance Cb), s_k the rms at
/// component k and d the separation of the centres. This is Condon's (1997, PASP
/// 109, 166; REF-CONDON-02) correlated-noise treatment applied to the amplitude
/// of a fixed-shape model: for an isolated point source in uniform noise the
/// amplitude error is sqrt(4/3) rms (a fit that also frees the shape, Condon's
/// eq. 41 with exponents (3/2, 3/2), gives rms). The flux-scale term f S is added
/// in quadrature in flux_err_total_jy.
///
/// Optional small shift (ForcedOptions::max_shift_arcsec > 0): after the linear
/// fit, the members of a group that are detected there get their centres freed
/// within a box of +-max_shift_arcsec along each pixel axis (converted with the
/// local pixel size) and the group's amplitudes and those centres are refitted by
/// bounded Levenberg-Marquardt (skerry/levmar.h; projection onto the box), starting
/// at the fixed-position solution. The covariance is again the sandwich form with
/// the beam-correlated noise, the meat in closed form from derivatives of the
/// same overlap integral I(d) = K exp(-d^T S^-1 d / 2), d = mu_k - mu_l:
///   <g_k, g_l> = I,  <g_k, a_l dg_l/dmu_l> = a_l I S^-1 d,
///   <a_k dg_k/dmu_k, a_l dg_l/dmu_l> = a_k a_l I (S^-1 - S^-1 d d^T S^-1),
/// (<.,.> the pixel-pair sum with the noise correlation). For an isolated point
/// source in uniform noise this gives the centre error (4/3) sigma_beam / SNR per
/// axis of the beam (Condon 1997's approximate eqs. 21 and 41 give sigma_beam/SNR).
/// Undetected members keep their positions: a free centre would climb onto the
/// nearest noise peak. Why the option: an unshifted fixed-position fit of a point
/// source whose true centre is d away recovers only the overlap fraction
///   a_fixed / a_true = exp(-d^T C^-1 d / 4)  (= exp(-2 ln 2 d^2 / theta^2) for a
/// circular beam of FWHM theta; the product-of-Gaussians integral),
/// whereas the peak of the beam sampled at the wrong place would be
/// exp(-d^T C^-1 d / 2) = exp(-4 ln 2 d^2 / theta^2).
#include <cmath>
#include <cstdint>
#include <vector>

#include "skerry/gaussian.h"
#include "skerry/image.h"
#include "skerry/sky.h"

namespace skerry {

/// One component to measure.
struct ForcedSource {
  double ra_deg = 0.0, dec_deg = 0.0;  ///< ICRS position [deg]
  /// Intrinsic (deconvolved) shape, FWHM [arcsec] and PA east of north [deg];
  /// zeros = a point source.
  Ellipse intrinsic;
};

struct ForcedOptions {
  /// Pixels used for a component: Mahalanobis radius (in units of the model's
  /// sigma) of its footprint; exp(-3^2/2) = 1.1% of the peak at the edge.
  double fit_radius_sigma = 3.0;
  /// Components closer than this (Mahalanobis distance of the centres in the
  /// summed covariance, sigma units) are fitted together.
  double blend_radius_sigma = 4.0;
  double detect_snr = 3.0;       ///< detected when a / rms_local >= detect_snr
  double limit_snr = 3.0;        ///< upper limit = limit_snr * rms_local, in Jy for the shape
  double flux_scale_frac = 0.0;  ///< fractional flux-scale uncertainty of this image
  /// Largest group fitted jointly; larger blends are split by position order
  /// (and flagged).
  int max_group_size = 64;
  /// Largest centre shift per pixel axis [arcsec]; 0 = positions fixed.
  double max_shift_arcsec = 0.0;
};

/// The `forced_flags` layout (our own), most severe first: bits 0-2 mean "no
/// value", bits 3-5 "a value with a caveat", bits 6-8 are information.
enum ForcedFlag : std::uint32_t {
  kForcedOutside = 1u << 0,       ///< off_image: position outside the image or on blank pixels: no value
  kForcedMasked = 1u << 1,        ///< masked: centre in a user mask / exclusion region: no value
  kForcedDegenerate = 1u << 2,    ///< degenerate_blend: blend members indistinguishable (singular system): no value
  kForcedEdge = 1u << 3,          ///< footprint_clipped: part of the footprint is off the image or blank
  kForcedShiftFailed = 1u << 4,   ///< shift_failed: the shifted fit did not converge: fixed-position values kept
  kForcedShiftAtBound = 1u << 5,  ///< shift_at_bound: the fitted shift reached +-max_shift_arcsec on a pixel axis
  kForcedNotDetected = 1u << 6,   ///< not_detected: below detect_snr: use the upper limit
  kForcedBlended = 1u << 7,       ///< joint_fit: fitted together with neighbours (a blend group)
  kForcedGroupSplit = 1u << 8,    ///< blend_split: blend larger than max_group_size was split
};

struct ForcedMeasurement {
  double x = NAN, y = NAN;                  ///< 0-based pixel position in this image
  double peak_jy_per_beam = NAN;            ///< fitted amplitude a [Jy/beam]
  double peak_err_jy_per_beam = NAN;        ///< its 1-sigma error (sandwich form)
  double flux_jy = NAN;                     ///< integrated flux density S [Jy] (may be <= 0)
  double flux_err_jy = NAN;                 ///< statistical 1-sigma error of S [Jy]
  double flux_err_total_jy = NAN;           ///< with the flux-scale term in quadrature [Jy]
  double rms_jy_per_beam = NAN;             ///< local rms at the position [Jy/beam]
  double rms_flux_jy = NAN;                 ///< that rms on the flux scale of the shape [Jy]
  double upper_limit_jy = NAN;              ///< limit_snr * rms_flux_jy [Jy]
  bool detected = false;
  double convolved_maj_arcsec = NAN, convolved_min_arcsec = NAN, convolved_pa_deg = NAN;  ///< model shape
  /// Fitted centre shift (max_shift_arcsec > 0; 0 for members whose centre stayed
  /// fixed) on the sky: east = delta RA cos(Dec), north = delta Dec [arcsec], and
  /// 1-sigma errors (NaN where the centre was not free).
  double shift_east_arcsec = NAN, shift_north_arcsec = NAN;
  double shift_east_err_arcsec = NAN, shift_north_err_arcsec = NAN;
  std::int64_t group = -1;                  ///< blend group id (0-based, in input order)
  int group_size = 0;
  std::uint32_t flags = 0;
};

/// Measure every source in one image. rms: a map of the image's shape, or an
/// empty array to use rms_scalar everywhere. Parallel over groups; the result
/// (in input order) does not depend on the thread count. Throws
/// std::invalid_argument for an invalid beam or mismatched array shapes.
std::vector<ForcedMeasurement> forced_measure(const ImageF& image, const ImageF& rms,
                                              double rms_scalar, const PixelSky& wcs,
                                              const Beam& beam,
                                              const std::vector<ForcedSource>& sources,
                                              const ForcedOptions& options = {});

// ---------------------------------------------------------------------------
// Positions and stacking
// ---------------------------------------------------------------------------

/// An exclusion region: a circle on the sky.
struct ExclusionCircle {
  double ra_deg = 0.0, dec_deg = 0.0, radius_arcsec = 0.0;
};

struct StackOptions {
  ForcedOptions forced;             ///< used for the point-source measurement at each position
  int half_size_pix = 0;            ///< stack cut-out half size; 0 = 3 beam FWHMs
  /// Annulus (in beam FWHMs from the centre) where the stack's rms is measured.
  double rms_inner_beams = 1.5;
};

struct StackResult {
  std::vector<ForcedMeasurement> at_positions;  ///< point-source forced values, input order
  ImageF stack;                     ///< pixel-wise median of the cut-outs [Jy/beam]
  long n_stacked = 0;               ///< positions that entered the stack
  double stacked_peak_jy_per_beam = NAN;  ///< amplitude of a beam fitted at the stack centre
  double stacked_flux_jy = NAN;     ///< = peak for a point source [Jy]
  double stack_rms_jy_per_beam = NAN;  ///< robust rms of the stack's outer annulus
  double stacked_flux_err_jy = NAN; ///< error of the stacked amplitude from that rms
};

/// Forced point-source measurement at each position, and a median stack of the
/// image at those positions (cut-outs sampled at the exact sub-pixel positions
/// by bilinear interpolation). Positions whose centre is masked (mask != 0 or
/// inside an exclusion circle) are flagged kForcedMasked and left out of the
/// stack; masked pixels are NaN in the cut-outs and are ignored by the median.
/// mask: empty or the image's shape.
StackResult forced_at_positions(const ImageF& image, const ImageF& rms, double rms_scalar,
                                const PixelSky& wcs, const Beam& beam,
                                const std::vector<ForcedSource>& positions, const MaskU8& mask,
                                const std::vector<ExclusionCircle>& exclusions,
                                const StackOptions& options = {});

}  // namespace skerry
