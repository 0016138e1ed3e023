#include "skerry/quality.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <stdexcept>

namespace skerry {
namespace {
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
}

// Gehrels (1986, ApJ 303, 336), eq. (7) with S = 1: lambda_u = N + S sqrt(N + 3/4) + (S^2 + 3)/4.
double gehrels_upper(double n) { return n + std::sqrt(n + 0.75) + 1.0; }

// Gehrels (1986), eq. (12) with S = 1 (beta = 0): lambda_l = N (1 - 1/(9N) - S/(3 sqrt N))^3.
double gehrels_lower(double n) {
  if (n <= 0) return 0.0;
  const double t = 1.0 - 1.0 / (9.0 * n) - 1.0 / (3.0 * std::sqrt(n));
  return n * t * t * t;
}

std::vector<double> log_bin_edges(const std::vector<double>& values, int bins_per_decade) {
  if (bins_per_decade < 1) throw std::invalid_argument("bins_per_decade must be >= 1");
  double lo = std::numeric_limits<double>::infinity(), hi = 0;
  for (double v : values)
    if (std::isfinite(v) && v > 0) { lo = std::min(lo, v); hi = std::max(hi, v); }
  if (!(hi > 0)) return {};
  // Edges on a fixed grid of 10^(k / bins_per_decade): the same bins for every catalogue.
  const double step = 1.0 / bins_per_decade;
  const long k0 = static_cast<long>(std::floor(std::log10(lo) / step));
  long k1 = static_cast<long>(std::floor(std::log10(hi) / step)) + 1;
  if (k1 <= k0) k1 = k0 + 1;
  std::vector<double> e;
  for (long k = k0; k <= k1; ++k) e.push_back(std::pow(10.0, k * step));
  return e;
}

std::vector<double> count_flux_jy(const std::vector<double>& s_peak_jy_per_beam, const std::vector<double>& s_int_jy,
                                  const std::vector<double>& resolved) {
  if (s_peak_jy_per_beam.size() != s_int_jy.size() || s_int_jy.size() != resolved.size())
    throw std::invalid_argument("count_flux_jy: peak, integrated and resolved columns differ in length");
  std::vector<double> out(resolved.size(), kNaN);
  for (std::size_t i = 0; i < resolved.size(); ++i) {
    if (!std::isfinite(resolved[i])) continue;
    const double s = resolved[i] != 0 ? s_int_jy[i] : s_peak_jy_per_beam[i];
    if (std::isfinite(s)) out[i] = s;
  }
  return out;
}

std::vector<double> sum_by_group(const std::vector<double>& value, const std::vector<double>& member_group,
                                 const std::vector<double>& group_id) {
  if (value.size() != member_group.size())
    throw std::invalid_argument("sum_by_group: values and their group ids differ in length");
  std::unordered_map<double, std::size_t> slot;
  for (std::size_t g = 0; g < group_id.size(); ++g) slot.emplace(group_id[g], g);
  std::vector<double> sum(group_id.size(), 0.0);
  std::vector<char> seen(group_id.size(), 0);
  for (std::size_t i = 0; i < value.size(); ++i) {
    const auto it = slot.find(member_group[i]);
    if (it == slot.end()) continue;
    sum[it->second] += value[i];  // a NaN member makes the group NaN
    seen[it->second] = 1;
  }
  for (std::size_t g = 0; g < sum.size(); ++g)
    if (!seen[g] || !std::isfinite(sum[g])) sum[g] = kNaN;
  return sum;
}

std::vector<CountsBin> euclidean_counts(const std::vector<double>& flux_jy, const CountsOptions& options,
                                        const std::function<double(double)>& area_sr_of_flux) {
  std::vector<double> edges = options.edges_jy.empty() ? log_bin_edges(flux_jy, options.bins_per_decade)
                                                       : options.edges_jy;
  std::vector<CountsBin> out;
  if (edges.size() < 2) return out;
  for (std::size_t i = 1; i < edges.size(); ++i)
    if (!(edges[i] > edges[i - 1]) || !(edges[i - 1] > 0))
      throw std::invalid_argument("count bin edges must be positive and increasing");
  out.resize(edges.size() - 1);
  for (double s : flux_jy) {
    if (!std::isfinite(s)) continue;
    auto it = std::upper_bound(edges.begin(), edges.end(), s);
    if (it == edges.begin() || it == edges.end()) continue;  // below the first or at/after the last edge
    ++out[static_cast<std::size_t>(it - edges.begin()) - 1].n;
  }
  for (std::size_t i = 0; i < out.size(); ++i) {
    CountsBin& b = out[i];
    b.lo_jy = edges[i];
    b.hi_jy = edges[i + 1];
    b.centre_jy = std::sqrt(b.lo_jy * b.hi_jy);
    b.area_sr = area_sr_of_flux(b.centre_jy);
    // S^2.5 dN/dS [Jy^1.5 sr^-1] = S_c^2.5 * N / (A [sr] * dS [Jy]).
    const double scale = b.area_sr > 0 ? std::pow(b.centre_jy, 2.5) / (b.area_sr * (b.hi_jy - b.lo_jy)) : kNaN;
    const double n = static_cast<double>(b.n);
    b.euclid = scale * n;
    b.euclid_lo = scale * gehrels_lower(n);
    b.euclid_hi = scale * gehrels_upper(n);
  }
  return out;
}

double VisibilityArea::area_at(double rms) const {
  if (rms_jy_per_beam.empty() || !(rms >= rms_jy_per_beam.front())) return 0.0;
  if (rms >= rms_jy_per_beam.back()) return area_sr.back();
  auto it = std::upper_bound(rms_jy_per_beam.begin(), rms_jy_per_beam.end(), rms);
  const std::size_t j = static_cast<std::size_t>(it - rms_jy_per_beam.begin());
  const double x0 = rms_jy_per_beam[j - 1], x1 = rms_jy_per_beam[j];
  const double t = (rms - x0) / (x1 - x0);
  return area_sr[j - 1] + t * (area_sr[j] - area_sr[j - 1]);
}

VisibilityArea visibility_area(const ImageF& rms, double pixel_area_sr, std::vector<double> rms_grid) {
  VisibilityArea v;
  std::sort(rms_grid.begin(), rms_grid.end());
  // One pass, no copy or sort of the map: each pixel is counted at the first grid
  // value it does not exceed, then the counts are summed up the grid.
  std::vector<float> gf(rms_grid.begin(), rms_grid.end());
  std::vector<std::size_t> at(gf.size() + 1, 0);
  std::size_t finite = 0;
  for (Eigen::Index i = 0; i < rms.size(); ++i) {
    const float r = rms.data()[i];
    if (!std::isfinite(r)) continue;
    ++finite;
    ++at[static_cast<std::size_t>(std::lower_bound(gf.begin(), gf.end(), r) - gf.begin())];
  }
  v.total_area_sr = static_cast<double>(finite) * pixel_area_sr;
  v.rms_jy_per_beam = rms_grid;
  std::size_t cnt = 0;
  for (std::size_t k = 0; k < gf.size(); ++k) {
    // Pixels with rms <= g: an exact count (integer), times the pixel solid angle.
    cnt += at[k];
    v.area_sr.push_back(static_cast<double>(cnt) * pixel_area_sr);
  }
  return v;
}

std::vector<double> rms_grid_for(const ImageF& rms, int n) {
  double lo = std::numeric_limits<double>::infinity(), hi = 0;
  for (Eigen::Index i = 0; i < rms.size(); ++i) {
    const double r = rms.data()[i];
    if (std::isfinite(r) && r > 0) { lo = std::min(lo, r); hi = std::max(hi, r); }
  }
  std::vector<double> g;
  if (!(hi > 0) || n < 2) return g;
  if (hi <= lo) hi = lo * 1.0001;
  for (int i = 0; i < n; ++i) g.push_back(lo * std::pow(hi / lo, static_cast<double>(i) / (n - 1)));
  g.back() = hi;  // the whole map at the last point, exactly
  return g;
}

// Wilson (1927, JASA 22, 209) score interval:
//   centre = (p + z^2/(2n)) / (1 + z^2/n),  half = z sqrt(p(1-p)/n + z^2/(4n^2)) / (1 + z^2/n).
void wilson_interval(std::size_t k, std::size_t n, double z, double& lo, double& hi) {
  if (n == 0) { lo = kNaN; hi = kNaN; return; }
  const double nn = static_cast<double>(n), p = static_cast<double>(k) / nn, z2 = z * z;
  const double den = 1.0 + z2 / nn;
  const double c = (p + z2 / (2 * nn)) / den;
  const double h = z * std::sqrt(p * (1 - p) / nn + z2 / (4 * nn * nn)) / den;
  lo = std::max(0.0, c - h);
  hi = std::min(1.0, c + h);
}

std::vector<FractionBin> fraction_curve(const std::vector<double>& x, const std::vector<bool>& detected,
                                        const std::vector<double>& measured_over_true,
                                        const std::vector<double>& edges) {
  if (x.size() != detected.size() || x.size() != measured_over_true.size())
    throw std::invalid_argument("fraction_curve: inputs differ in length");
  std::vector<FractionBin> out;
  if (edges.size() < 2) return out;
  out.resize(edges.size() - 1);
  std::vector<double> ratio_sum(out.size(), 0.0);
  std::vector<std::size_t> ratio_n(out.size(), 0);
  for (std::size_t i = 0; i < x.size(); ++i) {
    if (!std::isfinite(x[i])) continue;
    auto it = std::upper_bound(edges.begin(), edges.end(), x[i]);
    if (it == edges.begin() || it == edges.end()) continue;
    const std::size_t b = static_cast<std::size_t>(it - edges.begin()) - 1;
    ++out[b].n;
    if (detected[i]) {
      ++out[b].k;
      if (std::isfinite(measured_over_true[i])) { ratio_sum[b] += measured_over_true[i]; ++ratio_n[b]; }
    }
  }
  for (std::size_t b = 0; b < out.size(); ++b) {
    FractionBin& f = out[b];
    f.lo = edges[b];
    f.hi = edges[b + 1];
    f.centre = 0.5 * (f.lo + f.hi);
    f.fraction = f.n ? static_cast<double>(f.k) / static_cast<double>(f.n) : kNaN;
    wilson_interval(f.k, f.n, 1.0, f.fraction_lo, f.fraction_hi);
    f.mean_ratio = ratio_n[b] ? ratio_sum[b] / static_cast<double>(ratio_n[b]) : kNaN;
  }
  return out;
}

std::vector<FractionBin> reliability_curve(const std::vector<double>& snr_positive,
                                           const std::vector<double>& snr_negative,
                                           const std::vector<double>& edges) {
  std::vector<FractionBin> out;
  if (edges.size() < 2) return out;
  out.resize(edges.size() - 1);
  auto bin_of = [&](double s) -> long {
    if (!std::isfinite(s)) return -1;
    auto it = std::upper_bound(edges.begin(), edges.end(), s);
    if (it == edges.begin() || it == edges.end()) return -1;
    return static_cast<long>(it - edges.begin()) - 1;
  };
  for (double s : snr_positive) if (long b = bin_of(s); b >= 0) ++out[static_cast<std::size_t>(b)].n;
  for (double s : snr_negative) if (long b = bin_of(s); b >= 0) ++out[static_cast<std::size_t>(b)].k;
  for (std::size_t b = 0; b < out.size(); ++b) {
    FractionBin& f = out[b];
    f.lo = edges[b];
    f.hi = edges[b + 1];
    f.centre = 0.5 * (f.lo + f.hi);
    f.mean_ratio = kNaN;
    if (f.n == 0) { f.fraction = f.fraction_lo = f.fraction_hi = kNaN; continue; }
    const double n = static_cast<double>(f.n), k = static_cast<double>(f.k);
    // R = 1 - N_neg/N_pos; limits from Gehrels (1986) limits on N_neg.
    f.fraction = std::clamp(1.0 - k / n, 0.0, 1.0);
    f.fraction_lo = std::clamp(1.0 - gehrels_upper(k) / n, 0.0, 1.0);
    f.fraction_hi = std::clamp(1.0 - gehrels_lower(k) / n, 0.0, 1.0);
  }
  return out;
}

double fraction_limit(const std::vector<FractionBin>& bins, double level, std::size_t min_n) {
  // Scan from the top: the limit is the lowest centre of an unbroken run of bins at/above level.
  double limit = kNaN;
  for (std::size_t i = bins.size(); i-- > 0;) {
    if (bins[i].n < min_n) continue;
    if (bins[i].fraction >= level) limit = bins[i].centre;
    else break;
  }
  return limit;
}

}  // namespace skerry
