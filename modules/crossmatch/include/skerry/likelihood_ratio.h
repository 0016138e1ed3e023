#pragma once
/// Counterpart identification by the likelihood-ratio method.
///
/// A (sparse) catalogue A, e.g. radio sources with per-source positional
/// errors, is searched for counterparts in a dense catalogue B (optical or
/// infrared) with positions, errors and a magnitude (or -2.5 log10 of a flux).
/// Every B row within `radius_arcsec` of an A row is a candidate; each gets
///
///   LR = q(m) f(r) / n(m)                       (REF-LR-01; REF-LR-02)
///
///   f(r) = exp(-d^2 / 2) / (2 pi sqrt(det S))   [arcsec^-2]
///          the bivariate normal density of the offset D (east, north; arcsec)
///          with covariance S = S_A + S_B + sys^2 I and d^2 = D^T S^-1 D;
///   n(m)  background surface density of B per magnitude bin [arcsec^-2 bin^-1];
///   q(m)  expected magnitude distribution of true counterparts, normalised to
///         sum over bins = Q0 [bin^-1];
///
/// and the reliability (probability that it is the true counterpart)
///
///   R_j = LR_j / (sum_i LR_i + (1 - Q0))        (REF-LR-01)
///
/// summed over the candidates i of the same A row. Q0 is the fraction of A rows
/// whose counterpart is in B.
///
/// Estimates from the data (no prior knowledge needed):
///   * Background positions: the A positions moved by `background_shifts`
///     great-circle offsets of (4 + s mod 4) x radius at position angle
///     360 s / S (s = 0..S-1): away from any true counterpart but on the same
///     depth of B. B must therefore cover A's field plus 7 radii.
///   * n(m) = background candidates in the bin / (N_background pi r^2).
///   * q(m): total(m) = candidates around the A positions within the radius;
///     real(m) = total(m) - n(m) N_A pi r^2 (the excess over the background,
///     negative values set to 0); q(m) = Q0 real(m) / sum real(m)
///     (REF-LR-02).
///   * Q0 from the empty fields ("blanks"): U_A(r), U_bg(r) are the fractions of
///     A and background positions with no candidate within r; for r = radius
///     j / n_radii, j = 1..n_radii, U_A / U_bg = 1 - Q0 F(r), with F(r) the mean
///     over the A rows of 1 - exp(-r^2 / (2 sigma_i^2)), sigma_i^2 = trace(S_i)/2
///     (S_i with B's median error); Q0 by least squares over the radii
///     (REF-LR-03). This does not need q(m) or n(m), and it is
///     insensitive to how B is distributed in magnitude.
/// A fixed Q0 may be given instead. A magnitude bin with no background object
/// uses the density of one object (an upper limit), so LR stays finite.
///
/// Valid while the search radius holds nearly every true counterpart (radius
/// >= 3.5 sigma of the combined error) and the background is Poissonian;
/// clustered backgrounds or extended A sources (lobes) are outside the model.
///
/// Determinism: results sorted by (a, rank); all sums over integer counts or
/// in row order, so the output is identical for any thread count.
#include <cstdint>
#include <limits>
#include <vector>

#include "skerry/crossmatch.h"

namespace skerry {

struct LikelihoodRatioOptions {
  double radius_arcsec = 5.0;      ///< candidate search radius [arcsec]
  double systematic_arcsec = 0.0;  ///< systematic error per coordinate added to S [arcsec]
  double mag_bin = 0.5;            ///< magnitude bin width [mag]
  int background_shifts = 20;      ///< shifted copies of A for n(m) and U_bg(r) (>= 1)
  int q0_radii = 10;               ///< radii for the Q0 fit (>= 2)
  /// Fixed Q0 in (0, 1]; NaN = estimate from the blanks.
  double q0 = std::numeric_limits<double>::quiet_NaN();
};

/// One candidate (one A row, one B row).
struct LrCandidate {
  std::int64_t a = -1, b = -1;
  double sep_arcsec = 0.0;   ///< Vincenty separation [arcsec]
  double pa_deg = 0.0;       ///< position angle of B seen from A, east of north
  double norm_sep = 0.0;     ///< d = sqrt(D^T S^-1 D)
  double mag = 0.0;          ///< magnitude of B
  double f_r = 0.0;          ///< f(r) [arcsec^-2]
  double lr = 0.0;           ///< likelihood ratio
  double reliability = 0.0;  ///< R
  std::int32_t n_candidates = 0;  ///< candidates of this A row
  std::int32_t rank = 0;     ///< 1 = largest LR (ties: smaller separation, then B index)
};

struct LrMagnitudeBin {
  double mag_lo = 0.0, mag_hi = 0.0;  ///< bin edges [mag]
  std::int64_t total = 0;             ///< candidates around A positions
  std::int64_t background = 0;        ///< candidates around all background positions
  double n_m = 0.0;                   ///< background density [arcsec^-2 bin^-1]
  double real = 0.0;                  ///< total - expected background (>= 0)
  double q_m = 0.0;                   ///< q(m) [bin^-1], sums to Q0
};

struct LikelihoodRatioResult {
  std::vector<LrCandidate> candidates;  ///< sorted by (a, rank)
  std::vector<LrMagnitudeBin> bins;
  double q0 = 0.0;              ///< Q0 used
  bool q0_estimated = false;    ///< true: from the blanks; false: given
  double q0_fit_rms = 0.0;      ///< rms residual of the blank-ratio fit
  std::vector<double> q0_radius_arcsec, q0_blank_a, q0_blank_background, q0_model_f;
  std::size_t n_a_used = 0;          ///< A rows with a valid position and error
  std::size_t n_background = 0;      ///< background positions used
  std::size_t a_invalid = 0, b_invalid = 0;  ///< rows without a usable position
  std::size_t a_no_error = 0;        ///< A rows with no usable error (never matched)
  std::size_t b_no_mag = 0;          ///< B rows without a finite magnitude (never candidates)
  double b_median_error_arcsec = 0.0;  ///< median per-coordinate error of B used in F(r)
};

/// Run the method. `a` needs error vectors; `b` may have none (errors 0).
/// `b_mag` has one entry per B row (NaN = no magnitude). Throws
/// std::invalid_argument for bad options or inputs of the wrong length.
LikelihoodRatioResult likelihood_ratio_match(const SkyPositions& a, const SkyPositions& b,
                                             const std::vector<double>& b_mag,
                                             const LikelihoodRatioOptions& opt);

}  // namespace skerry
