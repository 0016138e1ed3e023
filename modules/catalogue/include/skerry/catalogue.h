#pragma once
/// The source catalogue: grouping fitted components into sources, the flag
/// bitmask every catalogue row carries, and the structure class of a source.
/// Pure computation on in-memory values (no files, no command line).
///
/// Grouping rule (documented, settable through GroupingOptions):
///  1. Components of one island always belong to one source.
///  2. Two components of different islands are linked ("friends") when the gap
///     between their extents is at most `link_gap_beams` restoring-beam major
///     FWHMs:  gap = sep - h_i - h_j,  where sep is the great-circle separation
///     of the centres (Vincenty) and h the half-width of the component's fitted
///     (beam-convolved) FWHM ellipse projected on the line joining the centres
///     (support function h = 1/2 sqrt(M^2 cos^2 d + m^2 sin^2 d), d = PA of the
///     line minus the ellipse PA). For two point sources with link_gap_beams = 1
///     that links centres up to 2 beams apart.
///  3. ... restricted to pairs whose integrated flux densities differ by at most
///     a factor `link_max_flux_ratio` (0 = no restriction): the lobes of one
///     radio galaxy are usually within a factor of a few, while a faint
///     neighbour of a bright source is more often an unrelated object or an
///     artefact (and is flagged kFlagNearBright).
///  4. Sources are the connected sets (friends-of-friends, transitive closure)
///     of rules 1-3. Source ids are 1-based, in order of each source's smallest
///     component index, so they are a total order independent of threads.
///
/// Source measurements:
///  - position: flux-weighted mean of the component unit vectors (weights
///    S_int, clamped at 0; equal weights when every S_int <= 0), normalised;
///    its error sigma^2 = sum w_i^2 sigma_i^2 / (sum w_i)^2 per axis (weights
///    treated as exact; common practice).
///  - total flux density: sum of the components' S_int; error: their errors in
///    quadrature (treated as independent: an approximation inside one island,
///    where fitted fluxes are anti-correlated, common practice).
///  - flux densities: s_int_model = the components' sum above; s_int_pix = the
///    sum of (image - background) over the islands' flux apertures (each island
///    dilated by catalogue.aperture_margin_beams, other islands left out) / the
///    beam area in pixels, its error the apertures' pixel-sum errors in
///    correlated noise in quadrature. The residual flux R = sum over the
///    apertures of (data - model) tests the model: s_int = s_int_pix when |R| >=
///    residual_flux_snr x that error (the Gaussians leave flux unmodelled, or
///    their wings claim flux the data do not have), else s_int_model.
///  - centroid: the intensity-weighted mean of the islands' positive pixels.
///  - las_emission: from the emission rather than the fits: D = the largest
///    separation of the islands' extreme pixels plus one pixel (the contour at
///    the islands' boundary, detect.grow_snr x rms), minus in quadrature the
///    diameter a point source of the source's peak P would have at that level
///    L, D0 = b_maj sqrt(ln(P / L) / ln 2) (b_maj the beam's major FWHM; a
///    Gaussian falls to L at that diameter, REF-GAUSS-01): sqrt(D^2 - D0^2),
///    0 when D <= D0. For a Gaussian source of intrinsic FWHM theta this is
///    theta sqrt(ln(P / L) / ln 2): the intrinsic extent to the same contour.
///  - largest angular size (LAS): the largest of (a) each component's
///    deconvolved major FWHM and (b) over pairs, sep_ij + h_i + h_j with h the
///    half-width of the *deconvolved* FWHM ellipse projected on the line
///    joining the centres. A single unresolved component has LAS 0 (an upper
///    limit: the source carries kInfoUnresolved).
///  - structure (names of our own; the enum leaves room for classes such as
///    double-lobed, triple or large-scale emission):
///      "compact"   one component, island residual acceptable;
///      "composite" two or more components, island residuals acceptable;
///      "diffuse"   some island of the source is poorly described by Gaussians:
///                its residual rms over its pixels exceeds
///                `diffuse_residual_ratio` times the mean local rms there
///                (and it has at least `diffuse_min_beams` beams of pixels).
#include <cstdint>
#include <string>
#include <vector>

#include <Eigen/Core>

#include "skerry/gaussian.h"
#include "skerry/image.h"

namespace skerry {

// ---- Flag bitmasks ----------------------------------------------------------
// Two bitmasks per catalogue row (uint32 written as int64 columns):
//  - `flags`: quality warnings only. A set bit means "trust this value less";
//    a row with flags == 0 has no known problem. A source row carries the OR of
//    its components' warnings plus the source-level ones.
//  - `info_bits`: informational bits that describe how a value was obtained or
//    what it is (an upper limit, a fixed shape, ...), not a problem with it.
// The values were produced either way. Bit numbers are our own.
inline constexpr std::uint32_t kFlagNearEdge = 1u << 0;        ///< centre within edge_margin_beams of the image edge (island: touches the edge)
inline constexpr std::uint32_t kFlagNearBlank = 1u << 1;       ///< a blank (NaN) pixel within blank_margin_beams of the centre (island: touches a blank pixel)
inline constexpr std::uint32_t kFlagNearBright = 1u << 2;      ///< a component bright_ratio times brighter (peak) lies within bright_radius_beams: possible artefact
inline constexpr std::uint32_t kFlagFitFailed = 1u << 3;       ///< fit did not converge (best parameters kept) or failed (moment-based values)
inline constexpr std::uint32_t kFlagBelowPbCut = 1u << 4;      ///< primary-beam response at the centre below the settable cut
inline constexpr std::uint32_t kFlagComponentCap = 1u << 5;    ///< the island had more candidate peaks than the component cap, or significant residual remained at the cap
inline constexpr std::uint32_t kFlagAtBound = 1u << 6;         ///< a fitted parameter ended at its bound (size floor, centre at the island edge)
inline constexpr std::uint32_t kFlagBadRms = 1u << 7;          ///< local rms not positive or not finite at the centre; SNR and errors undefined (NaN)
inline constexpr std::uint32_t kFlagDiffuse = 1u << 8;         ///< island/source: residual rms exceeds diffuse_residual_ratio x local rms
inline constexpr std::uint32_t kFlagNoPrimaryBeam = 1u << 9;   ///< primary-beam image given but blank or non-positive at the centre; corrected values NaN

inline constexpr std::uint32_t kInfoUnresolved = 1u << 0;       ///< not resolved: deconvolved size is an upper limit
inline constexpr std::uint32_t kInfoFixedShape = 1u << 1;       ///< shape held at the beam (fixed-beam mode); sizes are the beam's
inline constexpr std::uint32_t kInfoFewerComponents = 1u << 2;  ///< the island's peaks were fitted with fewer components (the larger model was not justified)
inline constexpr std::uint32_t kInfoMultiIsland = 1u << 3;      ///< source only: the source joins components of several islands
inline constexpr std::uint32_t kInfoResidualComponents = 1u << 4;///< the island's residual search added or split components

struct FlagInfo {
  std::uint32_t bit;
  const char* name;         ///< short name (README / catalogue meta)
  const char* description;  ///< one line
};
/// Every warning bit of `flags`, in bit order (README table, catalogue meta).
const std::vector<FlagInfo>& flag_table();
/// Every bit of `info_bits`, in bit order (README table, catalogue meta).
const std::vector<FlagInfo>& info_bit_table();
/// "near_edge|fit_failed" style text of a `flags` mask ("" for 0).
std::string flag_names(std::uint32_t flags);
/// "unresolved|fixed_shape" style text of an `info_bits` mask ("" for 0).
std::string info_bit_names(std::uint32_t info_bits);

// ---- Inputs -----------------------------------------------------------------

/// One fitted component as catalogued: what flagging and grouping read, and
/// every column of the component table. NaN where a value does not exist (e.g.
/// the primary-beam columns without a primary-beam image).
struct CatalogueComponent {
  std::int64_t island_id = 0;       ///< 1-based island id
  std::int64_t component = 0;       ///< 1-based index within the island (1 = brightest)
  std::int64_t source_id = 0;       ///< 1-based source id (group_sources)
  double x_pix = 0.0, y_pix = 0.0;  ///< centre, 0-based pixels
  double ra_deg = 0.0, dec_deg = 0.0;
  double ra_err_arcsec = 0.0, dec_err_arcsec = 0.0;  ///< RA error is of RA*cos(Dec)
  double s_peak_jy_per_beam = 0.0, s_peak_err_jy_per_beam = 0.0;
  double s_int_jy = 0.0, s_int_err_jy = 0.0;
  Ellipse fitted_arcsec;   ///< beam-convolved FWHM ellipse, PA east of north [arcsec, deg]
  double maj_err_arcsec = 0.0, min_err_arcsec = 0.0, pa_err_deg = 0.0;  ///< errors of fitted_arcsec
  /// Deconvolved FWHM ellipse; an axis marked as an upper limit below holds the
  /// limit (deconvolved_extent_arcsec() gives the extent with such axes 0).
  Ellipse deconv_arcsec;
  bool deconv_maj_upper_limit = false, deconv_min_upper_limit = false;
  double intrinsic_maj_err_arcsec = 0.0, intrinsic_min_err_arcsec = 0.0, intrinsic_pa_err_deg = 0.0;  ///< NaN for limits
  double background_jy_per_beam = 0.0;   ///< local background at the centre
  double rms_jy_per_beam = 0.0;          ///< local rms at the centre
  double snr = 0.0;                      ///< component SNR: fitted peak / local rms
  double chi2_red = 0.0;                 ///< island fit reduced chi-square
  bool resolved = false;                 ///< S_int/S_peak above the SNR-dependent envelope
  double pb = 0.0;                       ///< primary-beam response at the centre (NaN: none given)
  double s_peak_pbcor_jy_per_beam = 0.0; ///< primary-beam corrected peak (NaN: none)
  double s_int_pbcor_jy = 0.0;           ///< primary-beam corrected integrated (NaN: none)
  double s_int_pbcor_err_jy = 0.0;
  std::uint32_t flags = 0; ///< warnings set upstream (fit, pb, rms); flag_components() adds position bits
  std::uint32_t info_bits = 0;  ///< informational bits (kInfo*)
};

/// The deconvolved extent of a component: deconv_arcsec with an upper-limit
/// axis set to 0 (and everything 0 when the major axis is a limit).
Ellipse deconvolved_extent_arcsec(const CatalogueComponent& c);

/// What the structure class needs of one island.
struct CatalogueIsland {
  std::int64_t id = 0;                      ///< 1-based
  long n_pixels = 0;
  double n_beams = 0.0;                     ///< n_pixels / Omega_beam_pix
  double residual_rms_jy_per_beam = 0.0;    ///< rms of (image - background - model) over the island
  double mean_rms_jy_per_beam = 0.0;        ///< mean local rms over the island
  std::uint32_t flags = 0;
  /// Flux densities over the island's flux aperture (the island dilated by
  /// about a beam, without other islands; skerry/fitting.h IslandAperture) [Jy]
  /// (pixel sums / beam area in pixels, REF-GAUSS-04): the data (image -
  /// background), the fitted model, and the error of the data sum in correlated
  /// noise (docs/CONVENTIONS.md "Noise"). NaN where unknown: the source then
  /// keeps its components' sum.
  double aperture_data_jy = NAN;
  double aperture_model_jy = NAN;
  double aperture_err_jy = NAN;
  /// Intensity-weighted centroid of the positive island pixels (ICRS [deg]) and
  /// its weight, the sum of those pixels [Jy]; weight 0 when there is none.
  double centroid_ra_deg = NAN, centroid_dec_deg = NAN, centroid_weight_jy = 0.0;
  /// Extreme pixels of the island: for each of 16 directions the pixel centre
  /// farthest along it (ICRS [deg]); the island's diameter is the largest
  /// separation between them (within 2 % of the exact one: cos(pi/16)).
  std::vector<std::pair<double, double>> extent_points;
  double pixel_arcsec = 0.0;                ///< side of a pixel at the island [arcsec]
  double peak_jy_per_beam = NAN;            ///< largest (I - B) over the island
  double contour_jy_per_beam = NAN;         ///< the island's boundary level: grow SNR x mean rms
};

// ---- Position flags ---------------------------------------------------------

struct FlagOptions {
  double edge_margin_beams = 1.0;    ///< kFlagNearEdge distance, in beam major FWHMs
  double blank_margin_beams = 1.0;   ///< kFlagNearBlank distance, in beam major FWHMs
  double bright_radius_beams = 10.0; ///< kFlagNearBright search radius, in beam major FWHMs
  double bright_ratio = 50.0;        ///< kFlagNearBright when a neighbour's peak is >= this x own peak
};

/// Adds kFlagNearEdge, kFlagNearBlank and kFlagNearBright to `components`.
/// `image` supplies the grid size and the blank (NaN) pixels; distances are on
/// the sky through the local Jacobian `jac_arcsec_per_pix` (d(east,north)/d(x,y),
/// taken at the image centre; sky.h LocalGeometry). Deterministic.
void flag_components(std::vector<CatalogueComponent>& components, const ImageF& image,
                     const Eigen::Matrix2d& jac_arcsec_per_pix, const Beam& beam,
                     const FlagOptions& options);

// ---- Grouping ---------------------------------------------------------------

struct GroupingOptions {
  double link_gap_beams = 1.0;        ///< rule 2: largest gap between extents, in beam major FWHMs (< 0: islands only)
  double link_max_flux_ratio = 10.0;  ///< rule 3: largest S_int ratio of linked components (0 = any)
  double diffuse_residual_ratio = 1.5;  ///< residual rms / local rms above which an island is "diffuse"
  double diffuse_min_beams = 2.0;       ///< islands smaller than this many beam areas are never "diffuse"
  /// Total flux density rule: a source's s_int is its apertures' pixel flux
  /// (s_int_pix) when their residual flux, sum(data - model) over the
  /// apertures' pixels, reaches this many of its errors; otherwise the
  /// components' sum.
  double residual_flux_snr = 3.0;
  /// Margin of the islands' flux apertures [beam major FWHMs] (skerry/fitting.h
  /// IslandAperture; applied by the caller that measures the apertures).
  double aperture_margin_beams = 1.0;
};

enum class SourceStructure { Compact, Composite, Diffuse };
const char* structure_name(SourceStructure m);  ///< "compact", "composite", "diffuse"

struct CatalogueSource {
  std::int64_t id = 0;                   ///< 1-based
  std::vector<std::size_t> components;   ///< indices into the input, ascending
  std::vector<std::int64_t> islands;     ///< island ids, ascending, unique
  double ra_deg = 0.0, dec_deg = 0.0;
  double ra_err_arcsec = 0.0, dec_err_arcsec = 0.0;
  double s_int_jy = 0.0, s_int_err_jy = 0.0;
  double s_peak_max_jy_per_beam = 0.0;   ///< brightest component peak
  double las_arcsec = 0.0;               ///< largest angular size (see above)
  /// Both flux-density estimates and which one s_int_jy is (see the rule above).
  double s_int_model_jy = 0.0, s_int_model_err_jy = 0.0;
  double s_int_pix_jy = NAN, s_int_pix_err_jy = NAN;
  bool s_int_from_pixels = false;
  /// Emission-based measures from the islands' pixels (see above).
  double centroid_ra_deg = NAN, centroid_dec_deg = NAN;
  double las_emission_arcsec = NAN;
  SourceStructure structure = SourceStructure::Compact;
  std::uint32_t flags = 0;      ///< warnings (kFlag*)
  std::uint32_t info_bits = 0;  ///< informational bits (kInfo*)
};

/// Groups components into sources by the rule above. `islands` may be in any
/// order (looked up by id); components of islands not listed count as
/// non-diffuse. Deterministic for any thread count.
std::vector<CatalogueSource> group_sources(const std::vector<CatalogueComponent>& components,
                                           const std::vector<CatalogueIsland>& islands,
                                           const Beam& beam, const GroupingOptions& options);

// ---- Island pixel statistics ------------------------------------------------

/// True when the island counts as "diffuse" under `options` (rule above).
bool island_is_diffuse(const CatalogueIsland& island, const GroupingOptions& options);

/// Error of an island's pixel-sum flux density [Jy], docs/CONVENTIONS.md "Noise":
///   sigma_S = sqrt(sum_i sum_j s_i s_j rho_ij) / Omega_beam_pix,
/// the sums over the island's pixels (in_island != 0 and rms finite), s the
/// local rms [Jy/beam], rho_ij = exp(-1/2 d^T C^-1 d) the beam-shaped noise
/// correlation of pixels offset by d (C = beam covariance in pixels), evaluated
/// exactly over the island with the kernel truncated where rho < 1e-4 (which
/// drops a fraction 1e-4 of the correlation mass). For constant s and an island
/// much larger than the beam this tends to s sqrt(N_pix / Omega_beam_pix).
/// `rms` and `in_island` are the same small cutout. NaN without a usable pixel.
double pixel_sum_flux_error(const ImageF& rms, const MaskU8& in_island,
                            const Eigen::Matrix2d& beam_cov_pix, double beam_area_pix);

}  // namespace skerry
