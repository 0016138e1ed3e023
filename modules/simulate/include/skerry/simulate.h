#pragma once
/// Sky simulator: known truth for the demo and for injection tests.
///
/// Three steps, usable separately:
///   1. draw_sky_model(): a population of sources on the sky (ICRS positions,
///      intrinsic elliptical Gaussian shapes, spectra), independent of any grid,
///      so that several bands or many overlapping survey tiles see the same sky.
///   2. simulate_band(): one image of that sky on one pixel grid (a PixelSky the
///      caller builds, e.g. from io/wcs.h): sources convolved analytically with
///      the band's beam, beam-correlated noise, a smooth background, a noise level
///      rising towards the edges (primary-beam correction) and NaN borders.
///   3. add_sources(): inject sky sources into an existing image (completeness by
///      injection, fitting tests).
/// correlated_noise() makes the noise alone.
///
/// Determinism: every random number comes from a counter-based generator keyed by
/// (seed, purpose, index): source system i always uses stream (seed, "source", i);
/// the noise of a band uses stream (seed, noise_stream, Fourier column kx); the
/// background uses (seed, noise_stream, "background"). No generator is shared
/// between threads, the FFTs are 1-D FFTW transforms applied row by row / column
/// by column with the same plan, and overlapping sources are added to each pixel
/// in source order; so images and truth are bit-identical for any thread count
/// (oneTBB) and on reruns with the same seed.
///
/// Conventions (docs/CONVENTIONS.md): pixels 0-based (x, y) = (column, row); sizes are
/// FWHM; PA east of north; S proportional to nu^alpha; curvature in base 10:
///   log10(S(nu)/S_ref) = alpha log10(nu/nu_ref) + curvature [log10(nu/nu_ref)]^2.
/// Pure computation: no files, no headers.
#include <Eigen/Core>
#include <cstdint>
#include <limits>
#include <vector>

#include "skerry/gaussian.h"
#include "skerry/image.h"
#include "skerry/sky.h"
#include "skerry/table.h"

namespace skerry::sim {

// ---- Truth flags (bitmask; documented in the truth tables' descriptions) -------
enum SimFlag : std::uint32_t {
  kSimResolved = 1u << 0,         ///< intrinsic size > 0 (else a point source)
  kSimDoublePrimary = 1u << 1,    ///< brighter member of a close double
  kSimDoubleSecondary = 1u << 2,  ///< fainter member of a close double
  kSimCurved = 1u << 3,           ///< log-parabola spectrum (curvature != 0)
  kSimInjected = 1u << 4,         ///< given by the caller (add_sources), not drawn
  // per band:
  kSimOutsideImage = 1u << 8,     ///< centre outside this band's pixel grid: not rendered
  kSimOnBlank = 1u << 9,          ///< centre on a blanked (NaN) pixel of this band
  kSimNearEdge = 1u << 10,        ///< rendering box clipped by the grid edge or a blank
};

/// A source spectrum: log-parabola in base-10 logarithms (power law when
/// curvature = 0). Units: Jy, Hz.
struct Spectrum {
  double s_ref_jy = 0.0;      ///< integrated flux density at ref_freq_hz [Jy]
  double ref_freq_hz = 1.4e9; ///< reference frequency [Hz]
  double alpha = 0.0;         ///< spectral index at ref_freq_hz (S ~ nu^alpha)
  double curvature = 0.0;     ///< base-10 log-parabola term (negative: peaked)
  /// S(nu) = S_ref 10^(alpha t + curvature t^2), t = log10(nu / nu_ref) [Jy].
  double flux_at(double freq_hz) const;
  /// Local spectral index d ln S / d ln nu = alpha + 2 curvature t.
  double alpha_at(double freq_hz) const;
};

/// One source on the sky (a truth row).
struct SkySource {
  std::int64_t id = 0;            ///< 0-based, in drawing order (total order)
  double ra_deg = 0.0, dec_deg = 0.0;  ///< ICRS [deg]
  Ellipse intrinsic;              ///< intrinsic FWHMs [arcsec], PA east of north; 0 x 0 = point
  Spectrum spectrum;
  std::uint32_t flags = 0;        ///< SimFlag bits (sky part)
  std::int64_t partner_id = -1;   ///< other member of a close double, else -1
};

/// A point or Gaussian source to inject with a flat spectrum (flux at any frequency).
SkySource make_source(double ra_deg, double dec_deg, double s_int_jy,
                      const Ellipse& intrinsic_arcsec = {});

// ---- 1. Sky model ---------------------------------------------------------------

struct SkyModelOptions {
  // Region: positions uniform on the sphere in the cap of this centre and radius.
  double centre_ra_deg = 201.25, centre_dec_deg = -38.6;  ///< ICRS [deg]
  double radius_deg = 0.5;                                ///< cap radius [deg]
  /// Optional footprint: when set, a position is redrawn (from the source's own
  /// stream) until it falls on this grid, at least margin_pix inside its edges.
  /// `count` is then the number of systems on the grid.
  const PixelSky* footprint = nullptr;
  long footprint_nx = 0, footprint_ny = 0;
  double footprint_margin_pix = 0.0;

  std::size_t count = 300;  ///< number of systems (a close double is one system, two rows)

  // Flux densities at ref_freq_hz: dN/dS ~ S^-slope on [s_min_jy, s_max_jy]
  // (slope 2.5 = static Euclidean universe; drawn by inverting the CDF).
  double ref_freq_hz = 1.4e9;
  double s_min_jy = 1e-4, s_max_jy = 0.1;
  double slope = 1.8;

  // Shapes: a fraction is resolved; major FWHM log-uniform in
  // [size_min_arcsec, size_max_arcsec], axis ratio uniform in [axis_ratio_min, 1],
  // PA uniform in [0, 180).
  double resolved_fraction = 0.2;
  double size_min_arcsec = 2.0, size_max_arcsec = 12.0;
  double axis_ratio_min = 0.3;

  // Close doubles: a fraction of systems get a point-like companion at a
  // separation uniform in [sep_min, sep_max] x unit_beam.maj_arcsec, in a uniform
  // direction, with flux ratio (secondary / primary) uniform in [flux_ratio_min, 1]
  // and its own spectrum draw.
  double double_fraction = 0.0;
  double double_sep_min_beams = 1.0, double_sep_max_beams = 2.0;
  double double_flux_ratio_min = 0.5;
  Beam unit_beam{6.0, 5.0, 0.0};  ///< beam defining "beams" for separations [arcsec]

  // Spectra: alpha ~ Normal(alpha_mean, alpha_sigma); a fraction is curved with
  // curvature ~ Normal(curvature_mean, curvature_sigma) (base 10).
  double alpha_mean = -0.7, alpha_sigma = 0.2;
  double curved_fraction = 0.0;
  double curvature_mean = -0.2, curvature_sigma = 0.1;

  /// Minimum separation between systems [arcsec] (0 = none). Systems are placed
  /// in id order, each redrawn from its own stream until clear of the earlier
  /// ones (companions included); makes isolated-source test sets.
  double min_separation_arcsec = 0.0;
  int max_redraws = 10000;  ///< per system, for the footprint and separation rules
};

struct SkyModel {
  std::vector<SkySource> sources;  ///< sorted by id; a companion follows its primary
};

/// Draw a sky model. Throws std::invalid_argument naming the bad option
/// (e.g. "s_min_jy = 0 breaks 0 < s_min_jy < s_max_jy") or when a system cannot
/// be placed within max_redraws.
SkyModel draw_sky_model(const SkyModelOptions& options, std::uint64_t seed);

// ---- 2. One band image --------------------------------------------------------

/// Beam at another frequency: FWHMs scale as 1/frequency, PA unchanged.
Beam beam_at_frequency(const Beam& beam_ref, double ref_freq_hz, double freq_hz);

struct BandOptions {
  long nx = 0, ny = 0;        ///< grid size [pixels] (the PixelSky's grid)
  double freq_hz = 1.4e9;     ///< observing frequency [Hz]
  Beam beam{6.0, 5.0, 0.0};   ///< restoring beam at freq_hz [arcsec, deg]

  double rms_jy_per_beam = 2e-5;  ///< noise rms where the primary beam is 1 (0 = noiseless)
  std::uint64_t noise_stream = 0; ///< distinguishes realisations: band index, tile index

  /// Gaussian primary beam exp(-4 ln 2 r^2 / fwhm^2) about the pointing centre
  /// (r = great-circle distance); 0 = none (a flat pb of 1).
  double pb_fwhm_deg = 0.0;
  double pointing_ra_deg = std::numeric_limits<double>::quiet_NaN();  ///< NaN: grid centre
  double pointing_dec_deg = std::numeric_limits<double>::quiet_NaN();
  /// true: the image is primary-beam corrected (sources at their true flux, noise
  /// rms / pb rising towards the edges); false: apparent (sources x pb, flat noise).
  bool pb_corrected = true;
  double blank_below_pb = 0.0;  ///< pixels with pb below this become NaN
  long blank_border_pix = 0;    ///< a NaN border this many pixels wide

  /// Smooth background: a sum of `background_waves` plane waves on the sky with
  /// wavelengths log-uniform in [1, 2] x background_scale_arcsec, random
  /// directions and phases, scaled so its rms over the plane is the amplitude.
  double background_amplitude_jy_per_beam = 0.0;
  double background_scale_arcsec = 600.0;
  int background_waves = 4;

  /// Sources are point-sampled at pixel centres out to this many sigma along
  /// every direction of the convolved Gaussian (8: lost flux fraction e^-32).
  double cutoff_sigma = 8.0;
  bool keep_background = false;  ///< fill BandImage::background
  bool keep_model = false;       ///< fill BandImage::model (noiseless sources only)
};

/// Truth of one source in one band image.
struct BandSource {
  std::int64_t id = 0;            ///< SkySource id
  double x = 0.0, y = 0.0;        ///< 0-based pixel position of the centre
  double s_true_jy = 0.0;         ///< S(freq) on the sky [Jy]
  double pb = 1.0;                ///< primary-beam value at the centre
  double s_int_jy = 0.0;          ///< integrated flux density as it appears in the image [Jy]
  double peak_jy_per_beam = 0.0;  ///< analytic peak of the convolved Gaussian in the image [Jy/beam]
  Ellipse convolved;              ///< intrinsic (+) beam: FWHMs [arcsec], PA east of north [deg]
  double local_rms_jy_per_beam = 0.0;  ///< noise rms at the centre in this image
  std::uint32_t flags = 0;        ///< SimFlag bits (sky part and band part)
};

struct BandImage {
  ImageF image;          ///< (y, x) Jy/beam; NaN = blanked
  ImageF primary_beam;   ///< pb in (0, 1] (NaN only without a sky position); empty when pb_fwhm_deg = 0
  ImageF background;     ///< truth background [Jy/beam]; empty unless keep_background
  ImageF model;          ///< noiseless sources [Jy/beam]; empty unless keep_model
  std::vector<BandSource> sources;  ///< one per sky source, in id order (outside ones flagged)
};

/// Render `model` on the grid of `sky` for one band. The noise correlation uses the
/// beam's pixel-frame shape at the grid centre for the whole grid (a flat-sky
/// approximation); sources use the local Jacobian at their own centres. pb and the
/// background are exact on nodes every 16 pixels and bilinear in between (pb
/// relative error < 1e-6 for fields of a few degrees). Sources whose centre lies
/// off the grid still add their wings (flagged kSimOutsideImage). Throws
/// std::invalid_argument naming the bad option.
BandImage simulate_band(const SkyModel& model, const PixelSky& sky, const BandOptions& options,
                        std::uint64_t seed);

// ---- 3. Injection ---------------------------------------------------------------

struct RenderOptions {
  double freq_hz = 1.4e9;    ///< frequency at which spectra are evaluated [Hz]
  Beam beam{6.0, 5.0, 0.0};  ///< restoring beam of the image [arcsec, deg]
  double cutoff_sigma = 8.0; ///< see BandOptions
  /// Optional per-pixel factor (e.g. a primary beam) applied to each source's
  /// flux at its centre pixel (apparent brightness); nullptr = 1.
  const ImageF* attenuation = nullptr;
};

/// Add the sources to `image` (whose grid is `sky`): each source is an elliptical
/// Gaussian with covariance C = C_intrinsic + C_beam on the sky (Wild 1970;
/// gaussian.h), mapped to the pixel frame with the local Jacobian at its centre
/// (parity and rotation included), with peak
///   A = S (bmaj bmin) / (cmaj cmin)  [Jy/beam]   (REF-SINT-01 inverted),
/// so that sum(pixels) / N_beam_pix = S (REF-GAUSS-04), and point-sampled at pixel
/// centres: I(p) = A exp(-0.5 (p - p0)^T C_pix^-1 (p - p0)). NaN pixels stay NaN.
/// Returns the truth of each source (same order as `sources`).
std::vector<BandSource> add_sources(ImageF& image, const PixelSky& sky,
                                    const std::vector<SkySource>& sources,
                                    const RenderOptions& options);
/// Same in double precision (for checks at the 1e-12 level).
std::vector<BandSource> add_sources(ImageD& image, const PixelSky& sky,
                                    const std::vector<SkySource>& sources,
                                    const RenderOptions& options);

// ---- Noise ------------------------------------------------------------------------

/// Gaussian noise of rms `rms` whose autocorrelation is the beam:
///   <n(p) n(p + d)> = rms^2 exp(-0.5 d^T C_beam_pix^-1 d)
/// (exp(-4 ln 2 r^2 / theta^2) along each axis; docs/CONVENTIONS.md "Noise"). It is
/// white noise convolved with a Gaussian kernel of covariance C_beam_pix / 2
/// (FWHMs / sqrt 2, same PA), done in the Fourier domain: complex white noise
/// times the kernel's analytic transfer function exp(-pi^2 k^T C_beam_pix k)
/// (k in cycles/pixel), one inverse real FFT (FFTW, single precision), scaled by
/// the exact expected variance (Parseval), not by the sample rms. The noise is
/// periodic over the grid (wraps at the edges). The beam should span at least
/// ~3 pixels FWHM along its minor axis, else the band limit truncates the spectrum.
///   beam_cov_pix  beam covariance in the pixel frame [pix^2] (see beam_cov_pix())
ImageF correlated_noise(long nx, long ny, const Eigen::Matrix2d& beam_cov_pix, double rms,
                        std::uint64_t seed, std::uint64_t stream = 0);

/// Beam covariance in the pixel frame at pixel (x, y) of `sky` [pix^2]:
/// J^-1 C_sky J^-T (sky.h). Throws std::invalid_argument where (x, y) has no sky.
Eigen::Matrix2d beam_cov_pix(const Beam& beam, const PixelSky& sky, double x, double y);
/// Same on a flat grid of square pixels of `pixel_arcsec`, north = +y, east = -x
/// when east_left (the usual parity), else east = +x.
Eigen::Matrix2d beam_cov_pix_flat(const Beam& beam, double pixel_arcsec, bool east_left = true);

// ---- A gnomonic grid without headers ------------------------------------------------

/// An analytic TAN (gnomonic) grid: standard coordinates (xi, eta) [deg] =
/// cd_deg (p - ref_pix), p 0-based (x, y); Calabretta & Greisen (2002) TAN through
/// core's gnomonic functions. For module tests and quick simulations; the pipeline
/// builds its grids with WCSLIB (io/wcs.h).
class TanGrid final : public PixelSky {
 public:
  /// cd_deg: column 0 = (xi, eta) step of +1 pixel in x, column 1 of +1 in y [deg].
  TanGrid(double ra0_deg, double dec0_deg, double ref_x, double ref_y, const Eigen::Matrix2d& cd_deg);
  /// Square pixels, rotated by rotation_deg (+y towards PA rotation_deg), east left
  /// unless east_right.
  static TanGrid square(double ra0_deg, double dec0_deg, double ref_x, double ref_y,
                        double pixel_arcsec, double rotation_deg = 0.0, bool east_right = false);
  bool pix_to_sky(double x, double y, double& ra_deg, double& dec_deg) const override;
  bool sky_to_pix(double ra_deg, double dec_deg, double& x, double& y) const override;

 private:
  double ra0_, dec0_, x0_, y0_;
  Eigen::Matrix2d cd_, cd_inv_;
};

// ---- Truth tables --------------------------------------------------------------------

/// Sky truth: one row per source (id, ra_deg, dec_deg, s_ref_jy, ref_freq_hz, alpha,
/// curvature, intrinsic maj/min/pa, flags, partner_id), with units, UCDs, descriptions.
Table sky_truth_table(const SkyModel& model);
/// Band truth: one row per entry of `band_sources` (sky columns of the source with
/// that id in `sky_sources`, plus x_pix1, y_pix1 (FITS 1-based), s_true_jy, pb,
/// s_int_jy, peak_jy_per_beam, convolved maj/min/pa, local_rms_jy_per_beam,
/// snr_true = peak / local rms, flags); meta freq_hz and the beam.
/// `band_sources` comes from simulate_band() or add_sources().
Table band_truth_table(const std::vector<SkySource>& sky_sources,
                       const std::vector<BandSource>& band_sources, double freq_hz,
                       const Beam& beam);

// ---- Counterpart catalogue (radio-optical field) --------------------------------------

/// A dense "optical" catalogue around radio sources, for counterpart
/// identification (likelihood-ratio method) tests and the demo.
///   Background: density_deg2 objects per deg^2, uniform on the sphere in the
///   box |Dec - Dec0| <= half_size_deg, |RA - RA0| cos Dec0 <= half_size_deg,
///   magnitudes from dN/dm ~ 10^(count_slope m) on [mag_min, mag_max] (a power
///   law in flux, as galaxy number counts are; count_slope ~ 0.3-0.4 at
///   optical depths, common practice).
///   Counterparts: a fraction `fraction` of the radio sources (chosen by each
///   source's own stream) has one object at its true position displaced by
///   that object's own error, with magnitude normal(mag_mean, mag_sigma)
///   truncated to [mag_min, mag_max] (brighter on average than the background).
///   Errors: per-coordinate 1-sigma uniform in [err_min_arcsec, err_max_arcsec],
///   the same in RA cos Dec and Dec.
/// Rows are sorted by (RA, Dec), so row order says nothing about the truth.
/// Deterministic for a seed (per-object counter-based streams).
struct CounterpartOptions {
  double density_deg2 = 1e5;
  double mag_min = 16.0, mag_max = 25.0;
  double count_slope = 0.35;
  double fraction = 0.75;
  double mag_mean = 20.5, mag_sigma = 1.2;
  double err_min_arcsec = 0.1, err_max_arcsec = 0.3;
};

struct CounterpartCatalogue {
  std::vector<double> ra_deg, dec_deg;  ///< ICRS [deg]
  std::vector<double> err_arcsec;       ///< 1-sigma per coordinate [arcsec]
  std::vector<double> mag;              ///< magnitude [mag]
  std::vector<std::int64_t> radio_index;  ///< index into the radio positions given; -1 = background
};

/// Throws std::invalid_argument naming a bad option.
CounterpartCatalogue draw_counterparts(const std::vector<double>& radio_ra_deg, const std::vector<double>& radio_dec_deg,
                                       double centre_ra_deg, double centre_dec_deg, double half_size_deg,
                                       const CounterpartOptions& options, std::uint64_t seed);

/// A whole radio-optical field without images: n_radio radio sources uniform in
/// the box shrunk by `radio_margin_deg` on every side (so the optical background
/// surrounds them), each measured with a circular Gaussian error of sigma
/// uniform in [radio_err_min_arcsec, radio_err_max_arcsec] per coordinate, and
/// their counterpart catalogue.
struct RadioOpticalField {
  std::vector<double> radio_ra_deg, radio_dec_deg;  ///< measured positions [deg]
  std::vector<double> radio_err_arcsec;             ///< per-coordinate 1-sigma [arcsec]
  std::vector<std::int64_t> true_counterpart;       ///< optical row, -1 = none
  CounterpartCatalogue optical;
};

RadioOpticalField draw_radio_optical_field(std::size_t n_radio, double centre_ra_deg, double centre_dec_deg,
                                           double half_size_deg, double radio_margin_deg,
                                           double radio_err_min_arcsec, double radio_err_max_arcsec,
                                           const CounterpartOptions& options, std::uint64_t seed);

/// The counterpart catalogue as a table: ra_deg, dec_deg, ra_err_arcsec,
/// dec_err_arcsec, mag, true_source_id (the given ids[radio_index], -1 for the
/// background), with units, UCDs and descriptions.
Table counterpart_table(const CounterpartCatalogue& cat, const std::vector<std::int64_t>& ids);

}  // namespace skerry::sim
