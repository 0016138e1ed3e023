#pragma once
/// Catalogue quality measurements: small-number Poisson errors, Euclidean-
/// normalised differential source counts, the visibility area of an rms map,
/// and completeness / reliability curves from detection outcomes. Pure
/// numerics: vectors in, result structs out (no files, no printing).
#include <cstddef>
#include <functional>
#include <vector>

#include "skerry/image.h"

namespace skerry {

/// Approximate 1-sigma (84.13 % one-sided) Poisson confidence limits for N
/// observed events, Gehrels (1986, ApJ 303, 336):
///   upper  lambda_u ~ N + sqrt(N + 3/4) + 1            (his eq. 7, S = 1)
///   lower  lambda_l ~ N (1 - 1/(9N) - 1/(3 sqrt(N)))^3 (his eq. 12, S = 1, beta = 0)
/// lambda_l = 0 for N = 0. Units: counts.
double gehrels_upper(double n);
double gehrels_lower(double n);

struct CountsOptions {
  /// Bin edges in flux density [Jy], increasing; at least two. Empty: bins of
  /// `bins_per_decade` logarithmic width spanning the finite positive fluxes.
  std::vector<double> edges_jy;
  int bins_per_decade = 5;
};

struct CountsBin {
  double lo_jy = 0, hi_jy = 0;
  double centre_jy = 0;          ///< geometric centre sqrt(lo hi) [Jy]
  std::size_t n = 0;             ///< sources in [lo, hi)
  double area_sr = 0;            ///< visibility area used [sr]
  double euclid = 0;             ///< S^2.5 dN/dS [Jy^1.5 sr^-1] at the centre
  double euclid_lo = 0, euclid_hi = 0;  ///< 1-sigma limits from Gehrels (1986)
};

/// Euclidean-normalised differential counts (common practice, e.g. Condon 1984,
/// ApJ 287, 461 [from memory]):
///   S^2.5 dN/dS = S_c^2.5 N / (A dS),   S_c = sqrt(lo hi), dS = hi - lo
/// with A [sr] the area over which a source of flux S_c would be detected.
/// `area_sr_of_flux(S)` gives that area (visibility area at the source's
/// detection threshold); pass a constant function for a flat noise map.
/// Sources outside every bin or non-finite are ignored.
std::vector<CountsBin> euclidean_counts(const std::vector<double>& flux_jy,
                                        const CountsOptions& options,
                                        const std::function<double(double)>& area_sr_of_flux);

/// The flux density [Jy] by which a component is counted: its fitted peak
/// [Jy/beam] when it is unresolved, its integrated flux density when resolved.
/// For a point source the two are equal by the definition of Jy/beam (common
/// practice), and the peak is the better measured: sigma(S_int) = sqrt(3)
/// sigma(S_peak) for a point source (Condon 1997, PASP 109, 166, eqs. 41-42: for
/// theta_M = theta_m = theta_N the three rho^2 are equal, so sigma_A = sigma and
/// sigma_S = sqrt(3) sigma). Counting faint point sources
/// by S_int spreads them over wider bins of noise and, with steep counts, lifts
/// more faint sources into a bin than it takes out (Eddington bias). Per entry:
/// resolved[i] != 0 takes s_int_jy[i]; otherwise s_peak_jy_per_beam[i]; NaN where
/// the chosen value or the resolved flag is not finite. Sizes must agree.
std::vector<double> count_flux_jy(const std::vector<double>& s_peak_jy_per_beam, const std::vector<double>& s_int_jy,
                                  const std::vector<double>& resolved);

/// Per group: the sum of `value` over the entries whose `member_group` equals
/// the group's id (e.g. a source's flux density from its components). Groups
/// with no member, or with a non-finite member value, get NaN. Sizes of value
/// and member_group must agree.
std::vector<double> sum_by_group(const std::vector<double>& value, const std::vector<double>& member_group,
                                 const std::vector<double>& group_id);

/// Bin edges used when options.edges_jy is empty (log bins over the data).
std::vector<double> log_bin_edges(const std::vector<double>& values, int bins_per_decade);

/// Visibility area: the sky area [sr] where the rms is at most each value of
/// `rms_grid` (i.e. where a source of peak flux k*rms would exceed a k-sigma
/// threshold). Cumulative, non-decreasing. `pixel_area_sr` is the solid angle
/// of one pixel. NaN pixels count nowhere.
struct VisibilityArea {
  std::vector<double> rms_jy_per_beam;  ///< the grid (sorted increasing)
  std::vector<double> area_sr;          ///< area with rms <= grid value
  double total_area_sr = 0;             ///< all finite pixels
  /// Linear interpolation of area at rms (0 below the first, total above the last).
  double area_at(double rms) const;
};
VisibilityArea visibility_area(const ImageF& rms, double pixel_area_sr,
                               std::vector<double> rms_grid);
/// rms_grid of n points spaced logarithmically between the map's minimum and maximum.
std::vector<double> rms_grid_for(const ImageF& rms, int n);

/// One binned fraction k of n with Gehrels-style 1-sigma binomial limits
/// approximated by the Wilson score interval (Wilson 1927, JASA 22, 209), z = 1.
struct FractionBin {
  double lo = 0, hi = 0, centre = 0;  ///< bin in the binning variable
  std::size_t n = 0, k = 0;
  double fraction = 0, fraction_lo = 0, fraction_hi = 0;
  double mean_ratio = 0;  ///< mean of measured/true flux of the k detections (NaN when k = 0)
};
/// Completeness curve: fraction of injected sources recovered per bin of
/// `x` (true flux density or true SNR). `measured_over_true` (same length, NaN
/// where not recovered) gives the flux bias per bin. `edges` increasing.
std::vector<FractionBin> fraction_curve(const std::vector<double>& x,
                                        const std::vector<bool>& detected,
                                        const std::vector<double>& measured_over_true,
                                        const std::vector<double>& edges);

/// Wilson score interval for k successes of n, z sigma (Wilson 1927).
void wilson_interval(std::size_t k, std::size_t n, double z, double& lo, double& hi);

/// Reliability from the negated image (common practice: noise is symmetric):
/// per SNR bin, R = 1 - N_neg / N_pos, clipped to [0, 1]; negative-to-positive ratio
/// = N_neg / N_pos. n = N_pos, k = N_neg. Bins with N_pos = 0 have fraction NaN.
std::vector<FractionBin> reliability_curve(const std::vector<double>& snr_positive,
                                           const std::vector<double>& snr_negative,
                                           const std::vector<double>& edges);

/// Lowest bin centre above which every bin with >= min_n entries has a
/// fraction >= level (e.g. 0.9 for the 90 % completeness limit); NaN if none.
double fraction_limit(const std::vector<FractionBin>& bins, double level, std::size_t min_n = 5);

}  // namespace skerry
