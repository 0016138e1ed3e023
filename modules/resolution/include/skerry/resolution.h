#pragma once
/// Common resolution for several bands: the common beam, convolution of an
/// image to it with the exact Gaussian kernel, reprojection of an image onto
/// another pixel grid, robust rms, and per-pixel spectral index maps.
///
/// Units: beams in arcsec (FWHM) and deg (PA east of north); images in Jy/beam.
#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include "skerry/gaussian.h"
#include "skerry/image.h"
#include "skerry/sky.h"

namespace skerry {

// ---------------------------------------------------------------------------
// Common beam
// ---------------------------------------------------------------------------

struct CommonBeamOptions {
  /// Linear enlargement of the minimal containing ellipse: both FWHMs are
  /// multiplied by (1 + enlarge_frac), so that C_common - C_i >= ((1+f)^2 - 1)
  /// C_common > 0 for every band and no kernel is a delta function.
  double enlarge_frac = 0.02;
};

/// The smallest-area ellipse (centred Gaussian covariance C) that contains every
/// beam (C - C_i positive semi-definite for all i), then enlarged.
///
/// Method: minimise det C subject to C - C_i >= 0, a convex problem in P = C^-1
/// (maximise log det P subject to P <= C_i^-1), whose optimum is unique.
/// (1) If one beam contains all others it is the answer. (2) For each pair the
/// minimal containing ellipse is closed form: whiten by A (A^{-1/2} B A^{-1/2} =
/// U D U^T); by the mirror symmetry along U the optimum is diagonal there,
/// C = A^{1/2} U max(I, D) U^T A^{1/2}; the smallest pair ellipse that contains
/// every beam is the answer. (3) Otherwise (three or more active beams, e.g.
/// elongated beams at three PAs) the convex problem is solved by a log-barrier
/// Newton method on the three elements of P (Boyd & Vandenberghe 2004, Convex
/// Optimization, sec. 11.3), to a relative duality gap of 1e-12.
/// Throws std::invalid_argument for no beams or an invalid beam.
Beam common_beam(const std::vector<Beam>& beams, const CommonBeamOptions& options = {});

// ---------------------------------------------------------------------------
// Convolution
// ---------------------------------------------------------------------------

struct ConvolveOptions {
  /// Output pixels whose valid-data fraction (the kernel-weighted share of
  /// non-NaN input pixels) is below this become NaN.
  double min_valid_fraction = 0.5;
  /// 0 = choose by estimated cost; 1 = force direct; 2 = force FFT.
  int method = 0;
};

struct ConvolveResult {
  ImageF image;               ///< convolved image in Jy/beam_B (rescaled by Omega_B/Omega_A)
  Beam kernel;                ///< the kernel (sky, arcsec, PA east of north)
  double rescale = 1.0;       ///< Omega_B/Omega_A applied (REF-CONV-02)
  bool used_fft = false;      ///< true when the FFT path was taken
};

/// Convolve a Jy/beam image of beam `from` to beam `to` with the unit-integral
/// Gaussian kernel C_to - C_from (REF-CONV-02, skerry/gaussian.h
/// convolution_kernel), expressed in the pixel frame by the local geometry at
/// the image centre, then rescale by Omega_to/Omega_from so that the output is in
/// Jy per beam `to`.
///
/// FFT path: FFTW (single precision, deterministic ESTIMATE plans, 1-D passes in
/// parallel over rows/columns) with the analytic transfer function of the
/// kernel, H(k) = exp(-2 pi^2 k^T C_pix k) (k in cycles/pixel): exact for the
/// sampled image; zero padding by 5 kernel sigmas avoids wrap-around. Direct
/// path: the kernel sampled at pixel centres out to 4 sigma, normalised to unit
/// sum. Chosen by estimated operation count.
/// NaN treatment (normalised convolution): NaN pixels are set to 0 with weight 0;
/// the data and the valid-pixel mask are convolved together and the result is
/// divided by the convolved mask. Input NaN pixels stay NaN; output pixels with a
/// valid fraction below min_valid_fraction are NaN.
/// Throws std::invalid_argument when `to` is not strictly larger than `from`.
ConvolveResult convolve_to_beam(const ImageF& image, const PixelSky& wcs, const Beam& from,
                                const Beam& to, const ConvolveOptions& options = {});

/// Convolve with a unit-integral Gaussian of pixel-frame covariance [pix^2]
/// (no rescaling). The building block of convolve_to_beam.
ImageF convolve_gaussian_pixels(const ImageF& image, const Eigen::Matrix2d& kernel_cov_pix,
                                const ConvolveOptions& options = {}, bool* used_fft = nullptr);

// ---------------------------------------------------------------------------
// Reprojection
// ---------------------------------------------------------------------------

enum class Interpolation { Bilinear, Bicubic };

struct ReprojectOptions {
  /// Bicubic: Keys (1981, IEEE Trans. ASSP 29, 1153) cubic convolution, a = -0.5,
  /// over the 4x4 neighbours; falls back to bilinear where a neighbour is NaN or
  /// outside the image. Bilinear: the 2x2 neighbours; NaN if any is NaN.
  Interpolation interpolation = Interpolation::Bicubic;
  /// The target->source pixel mapping is computed exactly (pix->sky on the target,
  /// sky->pix on the source) on a grid of nodes this many pixels apart and
  /// interpolated bilinearly in between; a block whose interpolation error at its
  /// centre exceeds max_map_error_pix is computed exactly at every pixel.
  /// 1 = exact at every pixel.
  int map_step_pix = 16;
  double max_map_error_pix = 0.01;
};

/// Regrid an image onto a target grid (nx x ny pixels described by `target`).
/// Values are Jy/beam and are interpolated without a pixel-area factor
/// (docs/CONVENTIONS.md "Spectra": a surface brightness per beam does not depend on
/// the pixel size). Pixels that map outside the source image are NaN. Parallel
/// over rows; independent of the thread count.
ImageF reproject(const ImageF& source, const PixelSky& source_wcs, const PixelSky& target_wcs,
                 long target_nx, long target_ny, const ReprojectOptions& options = {});

/// Fraction of the target grid's pixels whose centres fall inside the source
/// image (sampled on a coarse grid); 0 means the images do not overlap.
double overlap_fraction(long source_nx, long source_ny, const PixelSky& source_wcs,
                        const PixelSky& target_wcs, long target_nx, long target_ny);

// ---------------------------------------------------------------------------
// Noise and spectral index maps
// ---------------------------------------------------------------------------

/// Robust rms of the finite pixels of an image [same unit]: 1.4826 * MAD about the
/// median, iterated with 3-sigma clipping until stable (at most 10 passes; common
/// practice for noise in images with sources). NaN if no finite pixel.
double robust_rms(const ImageF& image);

struct SpixMapOptions {
  double min_snr = 5.0;  ///< every band must have I / rms >= min_snr at the pixel
};

struct SpixMapResult {
  ImageF alpha;       ///< spectral index per pixel (NaN where not every band passes)
  ImageF alpha_err;   ///< its 1-sigma error
  long n_pixels = 0;  ///< pixels with a value
};

/// Per-pixel weighted least-squares power law (REF-SPIX-02, natural logs) through
/// images on one grid and at one resolution. rms: one map per band (same shape)
/// or empty maps to use rms_scalar[i]. flux_scale_frac per band is added in
/// quadrature as in spectra.h. Parallel over rows.
SpixMapResult spectral_index_map(const std::vector<const ImageF*>& images,
                                 const std::vector<const ImageF*>& rms_maps,
                                 const std::vector<double>& rms_scalar,
                                 const std::vector<double>& freq_hz,
                                 const std::vector<double>& flux_scale_frac,
                                 const SpixMapOptions& options = {});

// ---------------------------------------------------------------------------
// Combined detection image
// ---------------------------------------------------------------------------

struct DetectionImageOptions {
  /// Spectral index assumed by the weights (S proportional to nu^alpha). -0.7 is
  /// the usual value for the faint optically thin synchrotron population (common
  /// practice; from memory). The result does not depend on a reference frequency.
  double alpha = -0.7;
};

struct DetectionImageResult {
  ImageF snr;           ///< D per pixel: N(0, 1) where there is no source; NaN where no band has data
  long n_pixels = 0;    ///< pixels with a value
  long n_partial = 0;   ///< of those, pixels where some band had no value (D from the others)
};

/// Matched (inverse-variance weighted) combination of several bands on one grid
/// and at one resolution into one signal-to-noise image. With a_b =
/// (nu_b/nu_ref)^alpha the spectrum shape assumed for every source (Jy per common
/// beam at nu_b per Jy at nu_ref), band images I_b (background subtracted,
/// Jy/beam) and rms sigma_b [Jy/beam]:
///   S_hat = sum_b (a_b I_b / sigma_b^2) / sum_b (a_b^2 / sigma_b^2),
///   var(S_hat) = 1 / sum_b (a_b^2 / sigma_b^2),
///   D = S_hat / sqrt(var S_hat) = sum_b (a_b I_b / sigma_b^2) / sqrt(sum_b a_b^2 / sigma_b^2),
/// the one-parameter weighted least-squares estimate of the flux density at nu_ref
/// and its error (Bevington & Robinson 2003, Data Reduction and Error Analysis,
/// 3rd ed., sec. 4.1 weighted mean, eqs. 4.17-4.19 with the known factors a_b;
/// the linear "weighted sum" detection image of Szalay, Connolly & Szokoly 1999,
/// AJ 117, 68, sec. 2). D is dimensionless; nu_ref cancels.
/// Null distribution: with independent Gaussian noise in the bands (separate
/// observations) D is a unit-norm linear combination of independent N(0,1)
/// variables, so D ~ N(0, 1) at every pixel and P(D >= t) = erfc(t/sqrt 2)/2
/// (Abramowitz & Stegun 1964, 26.2.29). For a source whose true per-band SNRs
/// s_b differ in shape from a_b/sigma_b, E[D] = |s| cos(angle between s and
/// a/sigma) (Cauchy-Schwarz): the optimum sqrt(sum s_b^2) when the spectrum
/// matches. D is linear in the data, so a source keeps the common beam's
/// Gaussian shape in it (unlike the chi-square image of Szalay et al.).
/// rms: one map per band (same shape) or nullptr to use rms_scalar[b]. A pixel
/// where a band is NaN (or its rms is not > 0) is combined from the others; NaN
/// where none has a value. Parallel over rows; independent of the thread count.
/// Throws std::invalid_argument for fewer than one band or mismatched shapes.
DetectionImageResult combined_detection_image(const std::vector<const ImageF*>& images,
                                              const std::vector<const ImageF*>& rms_maps,
                                              const std::vector<double>& rms_scalar,
                                              const std::vector<double>& freq_hz,
                                              const DetectionImageOptions& options = {});

}  // namespace skerry
