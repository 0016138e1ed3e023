#pragma once
/// Catalogue cross-matching by sky separation.
///
/// Positions are ICRS degrees (convert other frames before calling). A k-d tree
/// on unit 3-vectors finds candidates by chord length c = 2 sin(theta/2), which
/// is exact everywhere on the sphere (no special cases at the poles or at
/// RA = 0/360); the final separation and position angle come from Vincenty's
/// formula (skerry/sky.h, REF-SEP-01), so a pair matches exactly when its
/// Vincenty separation is <= radius.
///
/// Rows whose position is not finite or whose |Dec| > 90 deg never match; they
/// are counted in MatchResult::a_invalid / b_invalid (callers decide whether
/// that is an error).
///
/// Determinism: every result is sorted by a total order (documented per mode)
/// and computed in fixed blocks, so it is identical for any thread count.
/// Memory: linear in the catalogue sizes plus the number of pairs returned.
#include <cstdint>
#include <limits>
#include <string>
#include <vector>

namespace skerry {

/// One catalogue's positions and optional positional errors.
///   ra_deg, dec_deg       ICRS position                                  [deg]
///   err_east_arcsec       1-sigma error along RA (east, i.e. RA * cos Dec) [arcsec]
///   err_north_arcsec      1-sigma error along Dec (north)                  [arcsec]
///   err_corr              correlation of the east and north errors (empty = 0)
/// The error vectors are empty or have one entry per row (error mode only).
struct SkyPositions {
  std::vector<double> ra_deg, dec_deg;
  std::vector<double> err_east_arcsec, err_north_arcsec, err_corr;
  std::size_t size() const { return ra_deg.size(); }
};

enum class MatchMode {
  Nearest,    ///< (a) for each row of A the nearest row of B within the radius
  All,        ///< (b) every pair within the radius
  OneToOne,   ///< (c) each row used at most once, pairs taken by increasing separation
  ErrorAware, ///< (d) normalised separation d < k(p) (see MatchOptions::completeness)
};

/// ErrorAware exclusive: the order in which pairs are offered to the one-to-one
/// assignment.
enum class ExclusiveOrder {
  NormSep,      ///< by increasing d, among the pairs with d < k
  Reliability,  ///< by decreasing match reliability R, among the pairs with R > min_reliability
};

struct MatchOptions {
  MatchMode mode = MatchMode::Nearest;
  /// Search radius [arcsec], > 0. In ErrorAware mode it is the hard upper limit
  /// of the separations considered.
  double radius_arcsec = 5.0;
  /// ErrorAware: completeness p in (0, 1); k = sqrt(-2 ln(1 - p)) (Rayleigh
  /// distribution of d for true matches, REF-SEP-03). p = 0.997 -> k = 3.4086.
  double completeness = 0.997;
  /// ErrorAware: systematic astrometric error per coordinate added to S [arcsec].
  double systematic_arcsec = 0.0;
  /// ErrorAware: exclusive (one-to-one) assignment. All pairs with d < k are
  /// taken in the global order (d, separation, A index, B index) and a pair is
  /// accepted when neither of its rows is used yet, so each row of A and of B
  /// appears at most once (greedy assignment by increasing normalised
  /// separation; common practice). n_candidates/rank still describe the full
  /// candidate list of the A row.
  bool exclusive = false;
  /// ErrorAware exclusive: pair order. Reliability: every pair within the
  /// radius gets R = LR / (sum LR + 1 - Q0) over the candidates of its A row,
  /// LR = Q0 f(r) / rho_B: the likelihood-ratio method with a single magnitude
  /// bin (REF-LR-01), f(r) the bivariate normal density of the offset, rho_B
  /// the surface density of B around the A positions and Q0 the fraction of A
  /// with a partner in B, both measured from the catalogues as in
  /// likelihood_ratio.h (REF-LR-03; background from 4 to 20 shifted copies of
  /// A, at least 10^6 positions where A allows). Pairs with R > min_reliability are taken by
  /// decreasing R (ties: d, separation, A index, B index), each row once. The
  /// d < k cut does not apply; R already weighs d against the chance of an
  /// unrelated B row that close, for each pair's own errors. R counts every B
  /// row near the A row as a possible chance neighbour, also those whose own
  /// partner is another A row, so for accepted pairs it is conservative: in
  /// simulated pairs of catalogues sum (1 - R) over the accepted pairs was
  /// about 1.6 x the number of false ones.
  ExclusiveOrder exclusive_order = ExclusiveOrder::NormSep;
  /// Reliability order: the lowest R accepted, in [0, 1).
  double min_reliability = 0.4;
  /// Reliability order: fixed Q0 in (0, 1]; NaN = estimate it.
  double prior_q0 = std::numeric_limits<double>::quiet_NaN();
};

/// One matched pair. `a`, `b` are 0-based row indices.
struct MatchPair {
  std::int64_t a = -1, b = -1;
  double sep_arcsec = 0.0;   ///< Vincenty separation [arcsec]
  double pa_deg = 0.0;       ///< position angle of B seen from A, east of north, [0, 360)
  std::int32_t n_candidates = 0;  ///< rows of B within the radius of this A row (ErrorAware: with d < k)
  std::int32_t rank = 0;     ///< 1 = closest of this A row's candidates (ErrorAware: smallest d)
  /// ErrorAware: normalised separation d = sqrt(D^T S^-1 D); NaN otherwise.
  double norm_sep = std::numeric_limits<double>::quiet_NaN();
  /// ErrorAware exclusive by reliability: R of this pair; NaN otherwise.
  double reliability = std::numeric_limits<double>::quiet_NaN();
};

struct MatchResult {
  /// Sorted by (a, rank) — i.e. by (a, separation, b); OneToOne, Nearest and
  /// ErrorAware give at most one pair per row of A (ErrorAware exclusive: and
  /// per row of B).
  std::vector<MatchPair> pairs;
  std::size_t a_invalid = 0, b_invalid = 0;  ///< rows with no usable position
  double k_threshold = std::numeric_limits<double>::quiet_NaN();  ///< ErrorAware: k
  /// ErrorAware exclusive by reliability: Q0 used, whether it was estimated,
  /// and the surface density of B around the A positions [arcsec^-2].
  double q0 = std::numeric_limits<double>::quiet_NaN();
  bool q0_estimated = false;
  double density_b_arcsec2 = std::numeric_limits<double>::quiet_NaN();
};

/// Match A against B. Throws std::invalid_argument for bad options (radius <= 0,
/// p outside (0, 1), error vectors of the wrong length or negative errors in
/// ErrorAware mode).
///
/// Ranking and ties: candidates of one A row are ordered by separation, then by
/// B index (ErrorAware: by d, then separation, then B index). OneToOne takes all
/// pairs within the radius in the global order (separation, A index, B index)
/// and accepts a pair when neither row is used yet (greedy by increasing
/// separation); its n_candidates/rank refer to the full candidate list.
MatchResult match_catalogues(const SkyPositions& a, const SkyPositions& b, const MatchOptions& opt);

/// k = sqrt(-2 ln(1 - p)), the Rayleigh quantile (REF-SEP-03).
double rayleigh_threshold(double completeness);

// ---- (e) self-match -------------------------------------------------------------

struct SelfMatchResult {
  /// Pairs (i < j) within the radius, sorted by (i, j); rank/n_candidates per i
  /// count the other rows within the radius.
  std::vector<MatchPair> pairs;
  /// Per row: friends-of-friends group (connected components of the pair
  /// graph); group id = smallest row index in the group; a row without
  /// neighbours is its own group.
  std::vector<std::int64_t> group;
  std::vector<std::int32_t> group_size;
  std::size_t invalid = 0;
};

SelfMatchResult self_match(const SkyPositions& cat, double radius_arcsec);

// ---- (f) several catalogues against a master list ---------------------------------

/// Flux densities of one catalogue (same units across catalogues for the
/// variability statistics, e.g. Jy). Empty vectors = no flux column.
struct FluxColumn {
  std::vector<double> flux, flux_err;
};

struct MultiMatchOptions {
  double radius_arcsec = 5.0;
};

struct MultiMatchResult {
  /// match_index[c][m] = row of catalogue c matched to master row m (nearest
  /// within the radius), or -1.
  std::vector<std::vector<std::int64_t>> match_index;
  std::vector<std::vector<double>> sep_arcsec;  ///< [c][m], NaN when unmatched
  std::vector<std::int32_t> n_catalogues;       ///< [m] catalogues with a match
  // Variability over the catalogues (epochs) where the object is matched and
  // has a finite flux (and, for chi2, a positive error):
  std::vector<std::int32_t> n_flux;       ///< [m] number of flux values used
  std::vector<double> mean_flux;          ///< [m] unweighted mean S
  std::vector<double> modulation_index;   ///< [m] m = sigma_S / mean S (sample sigma, n-1); NaN for n < 2
  std::vector<double> weighted_mean_flux; ///< [m] sum(S/e^2)/sum(1/e^2)
  std::vector<double> chi2_const;         ///< [m] sum((S - weighted mean)^2 / e^2)
  std::vector<std::int32_t> chi2_dof;     ///< [m] n - 1
};

/// Match every catalogue to the master list (nearest within the radius per
/// master row). `fluxes` is empty or has one FluxColumn per catalogue.
MultiMatchResult match_to_master(const SkyPositions& master, const std::vector<SkyPositions>& cats,
                                 const std::vector<FluxColumn>& fluxes, const MultiMatchOptions& opt);

// ---- summary statistics -------------------------------------------------------------

struct OffsetSummary {
  std::size_t n = 0;
  /// Median of (RA_B - RA_A) cos Dec_A and of Dec_B - Dec_A, via the tangent
  /// plane at A (east, north) [arcsec]; errors 1.2533 * sigma / sqrt(N) with
  /// sigma = 1.4826 MAD (Gaussian efficiency of the median; REF-ROBUST-01).
  double median_east_arcsec = 0, median_east_err_arcsec = 0;
  double median_north_arcsec = 0, median_north_err_arcsec = 0;
};

/// Offsets of matched pairs (B relative to A).
OffsetSummary offset_summary(const SkyPositions& a, const SkyPositions& b, const std::vector<MatchPair>& pairs);

struct ChanceEstimate {
  double expected_chance = 0;            ///< mean over the shifts of the matches found
  double expected_chance_err = 0;        ///< standard error of that mean
  std::vector<std::size_t> per_shift;    ///< matched A rows per shift
};

/// Expected number of chance matches (common practice): shift every position
/// of B by `shift_radii[i] * radius` along a great circle at position angle
/// 360 * i / n, re-match in Nearest mode, count the A rows matched, and average.
ChanceEstimate chance_matches(const SkyPositions& a, const SkyPositions& b, double radius_arcsec,
                              const std::vector<double>& shift_radii = {6, 7, 8, 9, 10, 11, 12, 13});

struct FluxRatioSummary {
  std::size_t n = 0;
  double median_ratio = std::numeric_limits<double>::quiet_NaN();  ///< median of S_A / S_B,pred
  double robust_scatter = std::numeric_limits<double>::quiet_NaN(); ///< 1.4826 MAD of the ratio
};

/// Flux ratio of matched pairs, S_A / (S_B (nu_A / nu_B)^alpha) with S ∝ nu^alpha
/// (docs/CONVENTIONS.md sign). Pairs with non-finite or non-positive flux are skipped.
/// freq_a_hz / freq_b_hz <= 0 or equal: no spectral correction.
FluxRatioSummary flux_ratio_summary(const std::vector<double>& flux_a, const std::vector<double>& flux_b,
                                    const std::vector<MatchPair>& pairs, double freq_a_hz, double freq_b_hz,
                                    double spectral_index);

/// Move (ra, dec) by `dist_deg` along the great circle at position angle
/// `pa_deg` (east of north). Exact on the sphere.
void offset_position(double ra_deg, double dec_deg, double pa_deg, double dist_deg, double& ra_out_deg,
                     double& dec_out_deg);

}  // namespace skerry
