// Cross-matching by sky separation: a 3-D cell grid on unit vectors, chord
// search, Vincenty separation. See skerry/crossmatch.h for the contract.
//
// Why a grid on 3-vectors: Euclidean distance between unit vectors is the chord
// c = 2 sin(theta/2), a monotonic function of the angle, so a 3-D search is
// exact everywhere on the sphere with no pole or RA-wrap special cases (a
// declination-zone or HEALPix partition needs care at the polar caps and at
// zone/pixel edges). A k-d tree (Debian's nanoflann 1.4.2) was tried first: its
// build is serial, and 10^7 x 10^7 took 30 s on 2 cores, over the 20 s
// target. Sorting the points by a 3-D cell key is parallel (tbb::parallel_sort),
// needs 40 bytes per point, and a query is a few binary searches plus a scan.
#include "skerry/crossmatch.h"

#include <tbb/parallel_for.h>
#include <tbb/parallel_sort.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <memory>
#include <numeric>
#include <stdexcept>

#include "skerry/likelihood_ratio.h"
#include "skerry/sky.h"

namespace skerry {

namespace {

constexpr double kPi = 3.14159265358979323846;
constexpr double kDeg = kPi / 180.0;
constexpr double kArcsecPerRad = 180.0 / kPi * 3600.0;
constexpr std::size_t kBlock = 2048;  // fixed work partition (results independent of threads)

bool valid_position(double ra, double dec) {
  return std::isfinite(ra) && std::isfinite(dec) && dec >= -90.0 && dec <= 90.0;
}

using Vec3 = std::array<double, 3>;

Vec3 to_vec(double ra_deg, double dec_deg) {
  const double a = ra_deg * kDeg, d = dec_deg * kDeg;
  const double cd = std::cos(d);
  return {cd * std::cos(a), cd * std::sin(a), std::sin(d)};
}

/// Spatial index of a catalogue: a uniform grid of cubes of side h over the
/// unit vectors' bounding cube [-1, 1]^3, points sorted by cell key
/// (ix, iy, iz). A point within chord c <= h of a query lies in the cells whose
/// ranges meet [q - c, q + c] in every coordinate: at most 2 per axis. Floating
/// point rounding is monotonic, so computing the cell range of q - c' and
/// q + c' (c' slightly larger than c) with the same expression as the points'
/// cells can never miss a point. The cell side follows the density (about two
/// points per cell over the catalogue's extent) and is never below the chord
/// radius, so the cost per query stays bounded for any radius.
class SkyIndex {
 public:
  SkyIndex(const SkyPositions& c, double chord_radius) {
    const std::size_t n = c.size();
    std::vector<std::int64_t> rows;
    rows.reserve(n);
    for (std::size_t i = 0; i < n; ++i) {
      if (valid_position(c.ra_deg[i], c.dec_deg[i])) rows.push_back(static_cast<std::int64_t>(i));
      else ++invalid_;
    }
    const std::size_t m = rows.size();
    std::vector<Vec3> v(m);
    tbb::parallel_for(std::size_t{0}, m, [&](std::size_t k) {
      v[k] = to_vec(c.ra_deg[rows[k]], c.dec_deg[rows[k]]);
    });
    // Extent of the points: the area they cover is about the product of the
    // two largest bounding-box sides (a small patch is nearly flat); at most 4 pi.
    double lo[3] = {1, 1, 1}, hi[3] = {-1, -1, -1};
    for (const auto& p : v)
      for (int d = 0; d < 3; ++d) {
        lo[d] = std::min(lo[d], p[d]);
        hi[d] = std::max(hi[d], p[d]);
      }
    double ext[3];
    for (int d = 0; d < 3; ++d) ext[d] = m ? std::max(0.0, hi[d] - lo[d]) : 0.0;
    std::sort(ext, ext + 3);
    const double area = std::min(4.0 * kPi, std::max(ext[1] * ext[2], 1e-20));
    const double h_density = m ? std::sqrt(2.0 * area / static_cast<double>(m)) : 1.0;
    h_ = std::max({chord_radius * (1.0 + 1e-6) + 1e-15, 2e-6, h_density});
    h_ = std::min(h_, 2.0);
    inv_h_ = 1.0 / h_;
    cells_ = static_cast<std::int64_t>(2.0 * inv_h_) + 2;
    // Sort by cell key (ties by row: a total order).
    std::vector<std::pair<std::uint64_t, std::int64_t>> kr(m);
    tbb::parallel_for(std::size_t{0}, m, [&](std::size_t k) { kr[k] = {key_of(v[k]), rows[k]}; });
    tbb::parallel_sort(kr.begin(), kr.end());
    std::vector<std::int64_t> pos_of_row(n, -1);
    keys_.resize(m);
    pts_.resize(m);
    row_.resize(m);
    for (std::size_t k = 0; k < m; ++k) pos_of_row[static_cast<std::size_t>(kr[k].second)] = static_cast<std::int64_t>(k);
    tbb::parallel_for(std::size_t{0}, m, [&](std::size_t k) {
      keys_[k] = kr[k].first;
      row_[k] = kr[k].second;
    });
    for (std::size_t k = 0; k < m; ++k) pts_[static_cast<std::size_t>(pos_of_row[static_cast<std::size_t>(rows[k])])] = v[k];
    build_columns();
  }

  std::size_t invalid() const { return invalid_; }

  std::int64_t cell(double x) const {
    const auto i = static_cast<std::int64_t>(std::floor((x + 1.0) * inv_h_));
    return std::clamp<std::int64_t>(i, 0, cells_ - 1);
  }
  std::uint64_t key_of(const Vec3& p) const {
    return (static_cast<std::uint64_t>(cell(p[0])) * static_cast<std::uint64_t>(cells_) +
            static_cast<std::uint64_t>(cell(p[1]))) *
               static_cast<std::uint64_t>(cells_) +
           static_cast<std::uint64_t>(cell(p[2]));
  }

  /// Positions k (into pts/row) of the points with chord^2 <= r2 of q.
  /// `c` is the chord radius (sqrt of r2 with margin), c <= h.
  void query(const Vec3& q, double r2, double c, std::vector<std::size_t>& out) const {
    out.clear();
    if (pts_.empty()) return;
    const double cm = c * (1.0 + 1e-9) + 1e-15;
    std::int64_t lo[3], hi[3];
    for (int d = 0; d < 3; ++d) {
      lo[d] = cell(q[d] - cm);
      hi[d] = cell(q[d] + cm);
    }
    const auto M = static_cast<std::uint64_t>(cells_);
    for (std::int64_t ix = lo[0]; ix <= hi[0]; ++ix)
      for (std::int64_t iy = lo[1]; iy <= hi[1]; ++iy) {
        const std::uint64_t col = static_cast<std::uint64_t>(ix) * M + static_cast<std::uint64_t>(iy);
        std::size_t b = 0, e = 0;
        if (!column_range(col, b, e)) continue;
        const std::uint64_t base = col * M;
        const std::uint64_t k0 = base + static_cast<std::uint64_t>(lo[2]);
        const std::uint64_t k1 = base + static_cast<std::uint64_t>(hi[2]);
        auto it = std::lower_bound(keys_.begin() + static_cast<std::ptrdiff_t>(b),
                                   keys_.begin() + static_cast<std::ptrdiff_t>(e), k0);
        for (auto k = static_cast<std::size_t>(it - keys_.begin()); k < e && keys_[k] <= k1; ++k) {
          const Vec3& p = pts_[k];
          const double dx = p[0] - q[0], dy = p[1] - q[1], dz = p[2] - q[2];
          if (dx * dx + dy * dy + dz * dz <= r2) out.push_back(k);
        }
      }
  }
  std::int64_t row(std::size_t k) const { return row_[k]; }

 private:
  /// Open-addressing hash of the occupied (ix, iy) columns -> their range of
  /// sorted points, so a query needs no search over the whole catalogue.
  struct Slot {
    std::uint64_t col = ~std::uint64_t{0};
    std::size_t begin = 0, end = 0;
  };
  static std::uint64_t mix(std::uint64_t x) {  // splitmix64 finaliser (Steele et al. 2014)
    x ^= x >> 30;
    x *= 0xbf58476d1ce4e5b9ULL;
    x ^= x >> 27;
    x *= 0x94d049bb133111ebULL;
    return x ^ (x >> 31);
  }
  void build_columns() {
    const auto M = static_cast<std::uint64_t>(cells_);
    std::size_t ncol = 0;
    for (std::size_t k = 0; k < keys_.size(); ++k)
      if (k == 0 || keys_[k] / M != keys_[k - 1] / M) ++ncol;
    std::size_t cap = 16;
    while (cap < 2 * ncol) cap *= 2;
    slots_.assign(cap, Slot{});
    mask_ = cap - 1;
    for (std::size_t k = 0; k < keys_.size();) {
      const std::uint64_t col = keys_[k] / M;
      std::size_t e = k;
      while (e < keys_.size() && keys_[e] / M == col) ++e;
      std::size_t h = mix(col) & mask_;
      while (slots_[h].col != ~std::uint64_t{0}) h = (h + 1) & mask_;
      slots_[h] = {col, k, e};
      k = e;
    }
  }
  bool column_range(std::uint64_t col, std::size_t& b, std::size_t& e) const {
    std::size_t h = mix(col) & mask_;
    while (true) {
      const Slot& s = slots_[h];
      if (s.col == col) {
        b = s.begin;
        e = s.end;
        return true;
      }
      if (s.col == ~std::uint64_t{0}) return false;
      h = (h + 1) & mask_;
    }
  }
  std::vector<Slot> slots_;
  std::size_t mask_ = 0;

  std::vector<std::uint64_t> keys_;
  std::vector<Vec3> pts_;
  std::vector<std::int64_t> row_;
  double h_ = 1.0, inv_h_ = 1.0;
  std::int64_t cells_ = 1;
  std::size_t invalid_ = 0;
};

/// Squared chord bound for a radius: a little larger than 2 sin(r/2), so that
/// rounding in the unit vectors never loses a pair; Vincenty decides.
double chord_bound(double radius_arcsec) {
  const double theta = std::min(radius_arcsec / kArcsecPerRad, kPi);
  return 2.0 * std::sin(theta / 2.0) * (1.0 + 1e-9) + 1e-13;
}

struct Cand {
  std::int64_t b;
  double sep_arcsec;
  double key;  // ordering key (separation, or d in error mode)
};

bool cand_less(const Cand& x, const Cand& y) {
  if (x.key != y.key) return x.key < y.key;
  if (x.sep_arcsec != y.sep_arcsec) return x.sep_arcsec < y.sep_arcsec;
  return x.b < y.b;
}

Eigen::Matrix2d error_cov(const SkyPositions& c, std::size_t i) {
  const double e = c.err_east_arcsec[i], n = c.err_north_arcsec[i];
  const double r = c.err_corr.empty() ? 0.0 : c.err_corr[i];
  Eigen::Matrix2d s;
  s << e * e, r * e * n, r * e * n, n * n;
  return s;
}

void check_errors(const SkyPositions& c, const char* which) {
  const std::size_t n = c.size();
  if (c.err_east_arcsec.size() != n || c.err_north_arcsec.size() != n)
    throw std::invalid_argument(std::string("error-aware matching needs positional errors for catalogue ") + which);
  if (!c.err_corr.empty() && c.err_corr.size() != n)
    throw std::invalid_argument(std::string("catalogue ") + which + ": error correlation has the wrong length");
}

/// Candidates of every A row, computed block by block.
/// fn(block, i, candidates) is called once per valid A row, from several
/// threads; `block` numbers the fixed work block (rows in cell-key order), so
/// fn may write to slots owned by row i or by the block.
std::size_t n_blocks(const SkyPositions& a) {
  std::size_t m = 0;
  for (std::size_t i = 0; i < a.size(); ++i) m += valid_position(a.ra_deg[i], a.dec_deg[i]) ? 1 : 0;
  return (m + kBlock - 1) / kBlock;
}

template <class Fn>
void for_each_row(const SkyPositions& a, const SkyIndex& idx, double radius_arcsec, const Fn& fn) {
  const double c = chord_bound(radius_arcsec);
  const double r2 = c * c;
  const std::size_t n = a.size();
  // Query in cell-key order, so consecutive queries touch neighbouring memory;
  // results go to per-row slots, so the order of work does not matter.
  std::vector<std::pair<std::uint64_t, std::int64_t>> order;
  order.reserve(n);
  for (std::size_t i = 0; i < n; ++i)
    if (valid_position(a.ra_deg[i], a.dec_deg[i])) order.push_back({0, static_cast<std::int64_t>(i)});
  tbb::parallel_for(std::size_t{0}, order.size(), [&](std::size_t k) {
    const auto i = static_cast<std::size_t>(order[k].second);
    order[k].first = idx.key_of(to_vec(a.ra_deg[i], a.dec_deg[i]));
  });
  tbb::parallel_sort(order.begin(), order.end());
  const std::size_t m = order.size();
  const std::size_t nblocks = (m + kBlock - 1) / kBlock;
  tbb::parallel_for(std::size_t{0}, nblocks, [&](std::size_t blk) {
    std::vector<std::size_t> hits;
    std::vector<Cand> cands;
    const std::size_t k0 = blk * kBlock, k1 = std::min(m, k0 + kBlock);
    for (std::size_t k = k0; k < k1; ++k) {
      const auto i = static_cast<std::size_t>(order[k].second);
      idx.query(to_vec(a.ra_deg[i], a.dec_deg[i]), r2, c, hits);
      cands.clear();
      for (std::size_t h : hits) cands.push_back({idx.row(h), 0.0, 0.0});
      fn(blk, i, cands);
    }
  });
}

}  // namespace

double rayleigh_threshold(double p) {
  if (!(p > 0.0 && p < 1.0)) throw std::invalid_argument("completeness must lie in (0, 1)");
  // Rayleigh CDF P(d < k) = 1 - exp(-k^2 / 2)  =>  k = sqrt(-2 ln(1 - p))  (REF-SEP-03)
  return std::sqrt(-2.0 * std::log1p(-p));
}

namespace {

/// ErrorAware exclusive assignment by match reliability (MatchOptions::
/// exclusive_order == Reliability): the likelihood-ratio method with one
/// magnitude bin (every B row the same "magnitude"), so q(m) / n(m) = Q0 / rho_B
/// and LR = Q0 f(r) / rho_B, R = LR / (sum LR + 1 - Q0) (REF-LR-01; Q0 from the
/// blanks, REF-LR-03), then a greedy one-to-one pass by decreasing R.
void exclusive_by_reliability(const SkyPositions& a, const SkyPositions& b, const MatchOptions& opt, MatchResult& res) {
  LikelihoodRatioOptions lo;
  lo.radius_arcsec = opt.radius_arcsec;
  lo.systematic_arcsec = opt.systematic_arcsec;
  lo.mag_bin = 1.0;
  lo.q0 = opt.prior_q0;
  // One bin needs fewer background positions than a magnitude histogram: at
  // least 10^6 of them (or 20 per A row for small catalogues), in 4 to 20 shifts.
  const double want = std::ceil(1e6 / std::max<double>(1.0, static_cast<double>(a.size())));
  lo.background_shifts = static_cast<int>(std::clamp(want, 4.0, 20.0));
  const LikelihoodRatioResult lr = likelihood_ratio_match(a, b, std::vector<double>(b.size(), 0.0), lo);
  res.a_invalid = lr.a_invalid;
  res.b_invalid = lr.b_invalid;
  res.q0 = lr.q0;
  res.q0_estimated = lr.q0_estimated;
  res.density_b_arcsec2 = lr.bins.empty() ? 0.0 : lr.bins[0].n_m;
  res.k_threshold = std::numeric_limits<double>::quiet_NaN();
  const auto& c = lr.candidates;  // sorted by (a, rank by LR)
  std::vector<std::size_t> order;
  for (std::size_t q = 0; q < c.size(); ++q)
    if (c[q].reliability > opt.min_reliability) order.push_back(q);
  tbb::parallel_sort(order.begin(), order.end(), [&](std::size_t x, std::size_t y) {
    if (c[x].reliability != c[y].reliability) return c[x].reliability > c[y].reliability;
    if (c[x].norm_sep != c[y].norm_sep) return c[x].norm_sep < c[y].norm_sep;
    if (c[x].sep_arcsec != c[y].sep_arcsec) return c[x].sep_arcsec < c[y].sep_arcsec;
    if (c[x].a != c[y].a) return c[x].a < c[y].a;
    return c[x].b < c[y].b;
  });
  std::vector<char> used_a(a.size(), 0), used_b(b.size(), 0), keep(c.size(), 0);
  for (std::size_t q : order) {
    const auto ia = static_cast<std::size_t>(c[q].a), ib = static_cast<std::size_t>(c[q].b);
    if (used_a[ia] || used_b[ib]) continue;
    used_a[ia] = used_b[ib] = 1;
    keep[q] = 1;
  }
  for (std::size_t q = 0; q < c.size(); ++q) {  // in (a, rank) order
    if (!keep[q]) continue;
    MatchPair p;
    p.a = c[q].a;
    p.b = c[q].b;
    p.sep_arcsec = c[q].sep_arcsec;
    p.pa_deg = c[q].pa_deg;
    p.n_candidates = c[q].n_candidates;
    p.rank = c[q].rank;
    p.norm_sep = c[q].norm_sep;
    p.reliability = c[q].reliability;
    res.pairs.push_back(p);
  }
}

}  // namespace

MatchResult match_catalogues(const SkyPositions& a, const SkyPositions& b, const MatchOptions& opt) {
  if (!(opt.radius_arcsec > 0.0) || !std::isfinite(opt.radius_arcsec))
    throw std::invalid_argument("match radius must be a positive number of arcsec");
  if (a.dec_deg.size() != a.ra_deg.size() || b.dec_deg.size() != b.ra_deg.size())
    throw std::invalid_argument("RA and Dec vectors differ in length");
  MatchResult res;
  const bool err_mode = opt.mode == MatchMode::ErrorAware;
  double k = 0.0;
  if (err_mode) {
    k = rayleigh_threshold(opt.completeness);
    res.k_threshold = k;
    if (!(opt.systematic_arcsec >= 0.0)) throw std::invalid_argument("systematic error must be >= 0");
    check_errors(a, "A");
    check_errors(b, "B");
    if (opt.exclusive && opt.exclusive_order == ExclusiveOrder::Reliability) {
      if (!(opt.min_reliability >= 0.0 && opt.min_reliability < 1.0))
        throw std::invalid_argument("minimum reliability must lie in [0, 1)");
      exclusive_by_reliability(a, b, opt, res);
      return res;
    }
  }
  const std::size_t na = a.size();
  for (std::size_t i = 0; i < na; ++i) res.a_invalid += valid_position(a.ra_deg[i], a.dec_deg[i]) ? 0 : 1;
  SkyIndex idx(b, chord_bound(opt.radius_arcsec));
  res.b_invalid = idx.invalid();
  const double radius = opt.radius_arcsec;
  const double sys2 = opt.systematic_arcsec * opt.systematic_arcsec;

  // Per-row candidate lists are needed for All and OneToOne; Nearest and
  // ErrorAware keep one pair per row.
  const bool one_per_row = opt.mode == MatchMode::Nearest || (err_mode && !opt.exclusive);
  std::vector<MatchPair> best;
  if (one_per_row) best.assign(na, MatchPair{});
  std::vector<std::vector<MatchPair>> block_pairs(one_per_row ? 0 : n_blocks(a));

  for_each_row(a, idx, radius, [&](std::size_t blk, std::size_t i, std::vector<Cand>& cands) {
    const double ra = a.ra_deg[i], dec = a.dec_deg[i];
    // Exact separation (Vincenty, REF-SEP-01) decides membership.
    std::size_t m = 0;
    for (auto& c : cands) {
      const double s = separation_deg(ra, dec, b.ra_deg[c.b], b.dec_deg[c.b]) * 3600.0;
      if (!(s <= radius)) continue;
      c.sep_arcsec = s;
      c.key = s;
      if (err_mode) {
        // D = offset of B from A in the tangent plane at A (east, north) [arcsec];
        // d^2 = D^T S^-1 D with S = S_A + S_B + sys^2 I [arcsec^2].
        double xi = 0, eta = 0;
        gnomonic_offset(ra, dec, b.ra_deg[c.b], b.dec_deg[c.b], xi, eta);
        Eigen::Vector2d d(xi * kArcsecPerRad, eta * kArcsecPerRad);
        Eigen::Matrix2d s2 = error_cov(a, i) + error_cov(b, static_cast<std::size_t>(c.b)) +
                             sys2 * Eigen::Matrix2d::Identity();
        const double det = s2(0, 0) * s2(1, 1) - s2(0, 1) * s2(1, 0);
        if (!(det > 0.0) || !std::isfinite(det)) continue;  // no usable error: never matches
        Eigen::Matrix2d inv;
        inv << s2(1, 1), -s2(0, 1), -s2(1, 0), s2(0, 0);
        inv /= det;
        const double d2 = d.dot(inv * d);
        const double dn = std::sqrt(std::max(0.0, d2));
        if (!(dn < k)) continue;
        c.key = dn;
      }
      cands[m++] = c;
    }
    cands.resize(m);
    if (m == 0) return;
    std::sort(cands.begin(), cands.end(), cand_less);
    auto make = [&](const Cand& c, std::size_t r) {
      MatchPair p;
      p.a = static_cast<std::int64_t>(i);
      p.b = c.b;
      p.sep_arcsec = c.sep_arcsec;
      p.pa_deg = position_angle_deg(ra, dec, b.ra_deg[c.b], b.dec_deg[c.b]);
      p.n_candidates = static_cast<std::int32_t>(m);
      p.rank = static_cast<std::int32_t>(r + 1);
      if (err_mode) p.norm_sep = c.key;
      return p;
    };
    if (one_per_row) {
      best[i] = make(cands[0], 0);
    } else {
      auto& out = block_pairs[blk];
      for (std::size_t r = 0; r < m; ++r) out.push_back(make(cands[r], r));
    }
  });

  if (one_per_row) {
    for (const auto& p : best)
      if (p.a >= 0) res.pairs.push_back(p);
    return res;
  }
  std::size_t total = 0;
  for (const auto& v : block_pairs) total += v.size();
  res.pairs.reserve(total);
  for (auto& v : block_pairs) {
    res.pairs.insert(res.pairs.end(), v.begin(), v.end());
    std::vector<MatchPair>().swap(v);
  }
  // Blocks hold rows in cell-key order: sort by (a, rank), a total order.
  tbb::parallel_sort(res.pairs.begin(), res.pairs.end(), [](const MatchPair& x, const MatchPair& y) {
    return x.a != y.a ? x.a < y.a : x.rank < y.rank;
  });
  if (opt.mode == MatchMode::All) return res;

  // One-to-one: global order (separation, A, B), greedy acceptance; ErrorAware
  // exclusive: global order (d, separation, A, B).
  std::vector<std::size_t> order(res.pairs.size());
  std::iota(order.begin(), order.end(), std::size_t{0});
  const auto& pr = res.pairs;
  tbb::parallel_sort(order.begin(), order.end(), [&](std::size_t x, std::size_t y) {
    if (err_mode && pr[x].norm_sep != pr[y].norm_sep) return pr[x].norm_sep < pr[y].norm_sep;
    if (pr[x].sep_arcsec != pr[y].sep_arcsec) return pr[x].sep_arcsec < pr[y].sep_arcsec;
    if (pr[x].a != pr[y].a) return pr[x].a < pr[y].a;
    return pr[x].b < pr[y].b;
  });
  std::vector<char> used_a(na, 0), used_b(b.size(), 0);
  std::vector<char> keep(pr.size(), 0);
  for (std::size_t o : order) {
    const auto& p = pr[o];
    if (used_a[p.a] || used_b[p.b]) continue;
    used_a[p.a] = used_b[p.b] = 1;
    keep[o] = 1;
  }
  std::vector<MatchPair> out;
  for (std::size_t q = 0; q < pr.size(); ++q)
    if (keep[q]) out.push_back(pr[q]);
  res.pairs.swap(out);  // already in (a, rank) order
  return res;
}

// ---- (e) self-match -------------------------------------------------------------------

SelfMatchResult self_match(const SkyPositions& cat, double radius_arcsec) {
  MatchOptions o;
  o.mode = MatchMode::All;
  o.radius_arcsec = radius_arcsec;
  MatchResult all = match_catalogues(cat, cat, o);
  SelfMatchResult res;
  res.invalid = all.a_invalid;
  const std::size_t n = cat.size();
  // Drop each row's match with itself and renumber ranks among the other rows.
  // Rows at identical positions: the row itself is removed by index, so the
  // order (separation, index) of the others is kept.
  std::vector<MatchPair> others;
  others.reserve(all.pairs.size());
  for (std::size_t q = 0; q < all.pairs.size();) {
    std::size_t e = q;
    while (e < all.pairs.size() && all.pairs[e].a == all.pairs[q].a) ++e;
    const std::int32_t cnt = static_cast<std::int32_t>(e - q) - 1;  // minus itself
    std::int32_t r = 0;
    for (std::size_t t = q; t < e; ++t) {
      MatchPair p = all.pairs[t];
      if (p.b == p.a) continue;
      p.rank = ++r;
      p.n_candidates = cnt;
      others.push_back(p);
    }
    q = e;
  }
  // Union-find over the pairs; group id = smallest row index of the component.
  std::vector<std::int64_t> parent(n);
  std::iota(parent.begin(), parent.end(), std::int64_t{0});
  auto find = [&](std::int64_t x) {
    while (parent[x] != x) {
      parent[x] = parent[parent[x]];
      x = parent[x];
    }
    return x;
  };
  for (const auto& p : others) {
    std::int64_t ra = find(p.a), rb = find(p.b);
    if (ra == rb) continue;
    if (ra < rb) parent[rb] = ra;
    else parent[ra] = rb;  // the root is always the smallest index
  }
  res.group.resize(n);
  res.group_size.assign(n, 0);
  for (std::size_t i = 0; i < n; ++i) res.group[i] = find(static_cast<std::int64_t>(i));
  for (std::size_t i = 0; i < n; ++i) ++res.group_size[res.group[i]];
  for (std::size_t i = 0; i < n; ++i) res.group_size[i] = res.group_size[res.group[i]];
  for (const auto& p : others)
    if (p.a < p.b) res.pairs.push_back(p);
  return res;
}

// ---- (f) several catalogues ----------------------------------------------------------------

MultiMatchResult match_to_master(const SkyPositions& master, const std::vector<SkyPositions>& cats,
                                 const std::vector<FluxColumn>& fluxes, const MultiMatchOptions& opt) {
  if (!fluxes.empty() && fluxes.size() != cats.size())
    throw std::invalid_argument("one flux column per catalogue expected");
  const std::size_t nm = master.size(), nc = cats.size();
  MultiMatchResult r;
  r.match_index.assign(nc, std::vector<std::int64_t>(nm, -1));
  r.sep_arcsec.assign(nc, std::vector<double>(nm, std::nan("")));
  r.n_catalogues.assign(nm, 0);
  MatchOptions o;
  o.mode = MatchMode::Nearest;
  o.radius_arcsec = opt.radius_arcsec;
  for (std::size_t c = 0; c < nc; ++c) {
    MatchResult m = match_catalogues(master, cats[c], o);
    for (const auto& p : m.pairs) {
      r.match_index[c][p.a] = p.b;
      r.sep_arcsec[c][p.a] = p.sep_arcsec;
      ++r.n_catalogues[p.a];
    }
  }
  const double nan = std::nan("");
  r.n_flux.assign(nm, 0);
  r.mean_flux.assign(nm, nan);
  r.modulation_index.assign(nm, nan);
  r.weighted_mean_flux.assign(nm, nan);
  r.chi2_const.assign(nm, nan);
  r.chi2_dof.assign(nm, 0);
  if (fluxes.empty()) return r;
  for (std::size_t c = 0; c < nc; ++c) {
    if (!fluxes[c].flux.empty() && fluxes[c].flux.size() != cats[c].size())
      throw std::invalid_argument("flux column length differs from its catalogue");
    if (!fluxes[c].flux_err.empty() && fluxes[c].flux_err.size() != cats[c].size())
      throw std::invalid_argument("flux error column length differs from its catalogue");
  }
  tbb::parallel_for(std::size_t{0}, nm, [&](std::size_t m) {
    // Values in catalogue order (fixed), so the sums do not depend on threads.
    std::vector<double> s, e;
    for (std::size_t c = 0; c < nc; ++c) {
      const std::int64_t j = r.match_index[c][m];
      if (j < 0 || fluxes[c].flux.empty()) continue;
      const double f = fluxes[c].flux[j];
      if (!std::isfinite(f)) continue;
      s.push_back(f);
      e.push_back(fluxes[c].flux_err.empty() ? nan : fluxes[c].flux_err[j]);
    }
    const std::size_t n = s.size();
    r.n_flux[m] = static_cast<std::int32_t>(n);
    if (n == 0) return;
    double sum = 0;
    for (double v : s) sum += v;
    const double mean = sum / static_cast<double>(n);
    r.mean_flux[m] = mean;
    if (n >= 2) {
      // Modulation index m = sigma_S / <S>, sigma_S the sample standard
      // deviation (n - 1) (common practice in variability studies).
      double ss = 0;
      for (double v : s) ss += (v - mean) * (v - mean);
      const double sd = std::sqrt(ss / static_cast<double>(n - 1));
      r.modulation_index[m] = mean != 0.0 ? sd / mean : nan;
    }
    // Chi-square against a constant flux density: the weighted mean
    // S_w = sum(S_i/e_i^2)/sum(1/e_i^2), chi2 = sum((S_i - S_w)^2/e_i^2), dof = n - 1
    // (least-squares fit of a constant; Bevington & Robinson 2003, ch. 4).
    double sw = 0, w = 0;
    std::size_t ne = 0;
    for (std::size_t q = 0; q < n; ++q)
      if (e[q] > 0 && std::isfinite(e[q])) {
        sw += s[q] / (e[q] * e[q]);
        w += 1.0 / (e[q] * e[q]);
        ++ne;
      }
    if (ne == 0) return;
    const double wm = sw / w;
    r.weighted_mean_flux[m] = wm;
    double chi2 = 0;
    for (std::size_t q = 0; q < n; ++q)
      if (e[q] > 0 && std::isfinite(e[q])) chi2 += (s[q] - wm) * (s[q] - wm) / (e[q] * e[q]);
    r.chi2_dof[m] = static_cast<std::int32_t>(ne) - 1;
    r.chi2_const[m] = ne >= 2 ? chi2 : nan;
  });
  return r;
}

// ---- summaries ----------------------------------------------------------------------------

namespace {

double median_of(std::vector<double> v) {
  if (v.empty()) return std::nan("");
  const std::size_t n = v.size(), h = n / 2;
  std::nth_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h), v.end());
  const double hi = v[h];
  if (n % 2) return hi;
  const double lo = *std::max_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h));
  return 0.5 * (lo + hi);
}

/// sigma = 1.4826 MAD, the Gaussian-consistent robust scale (REF-ROBUST-01).
double robust_sigma(const std::vector<double>& v, double med) {
  std::vector<double> dev(v.size());
  for (std::size_t i = 0; i < v.size(); ++i) dev[i] = std::fabs(v[i] - med);
  return 1.482602218505602 * median_of(std::move(dev));
}

}  // namespace

OffsetSummary offset_summary(const SkyPositions& a, const SkyPositions& b, const std::vector<MatchPair>& pairs) {
  OffsetSummary s;
  std::vector<double> de, dn;
  for (const auto& p : pairs) {
    double xi = 0, eta = 0;
    if (!gnomonic_offset(a.ra_deg[p.a], a.dec_deg[p.a], b.ra_deg[p.b], b.dec_deg[p.b], xi, eta)) continue;
    de.push_back(xi * kArcsecPerRad);
    dn.push_back(eta * kArcsecPerRad);
  }
  s.n = de.size();
  if (s.n == 0) {
    s.median_east_arcsec = s.median_north_arcsec = std::nan("");
    s.median_east_err_arcsec = s.median_north_err_arcsec = std::nan("");
    return s;
  }
  // Error of a median of N Gaussian values: sqrt(pi/2) sigma / sqrt(N) = 1.2533 sigma / sqrt(N)
  // (Kendall & Stuart, asymptotic variance of the sample median; common practice).
  const double f = std::sqrt(kPi / 2.0) / std::sqrt(static_cast<double>(s.n));
  s.median_east_arcsec = median_of(de);
  s.median_north_arcsec = median_of(dn);
  s.median_east_err_arcsec = f * robust_sigma(de, s.median_east_arcsec);
  s.median_north_err_arcsec = f * robust_sigma(dn, s.median_north_arcsec);
  return s;
}

void offset_position(double ra_deg, double dec_deg, double pa_deg, double dist_deg, double& ra_out,
                     double& dec_out) {
  // Direct problem on the sphere (spherical trigonometry, e.g. Smart 1977, Textbook
  // on Spherical Astronomy, ch. 1): sin d' = sin d cos r + cos d sin r cos PA,
  // da = atan2(sin PA sin r cos d, cos r - sin d sin d').
  const double d = dec_deg * kDeg, r = dist_deg * kDeg, pa = pa_deg * kDeg;
  const double sd = std::sin(d) * std::cos(r) + std::cos(d) * std::sin(r) * std::cos(pa);
  const double d2 = std::asin(std::clamp(sd, -1.0, 1.0));
  const double da = std::atan2(std::sin(pa) * std::sin(r) * std::cos(d), std::cos(r) - std::sin(d) * sd);
  double ra = ra_deg + da / kDeg;
  ra = std::fmod(ra, 360.0);
  if (ra < 0) ra += 360.0;
  ra_out = ra;
  dec_out = d2 / kDeg;
}

ChanceEstimate chance_matches(const SkyPositions& a, const SkyPositions& b, double radius_arcsec,
                              const std::vector<double>& shift_radii) {
  ChanceEstimate ce;
  if (shift_radii.empty()) return ce;
  MatchOptions o;
  o.mode = MatchMode::Nearest;
  o.radius_arcsec = radius_arcsec;
  const std::size_t ns = shift_radii.size();
  for (std::size_t s = 0; s < ns; ++s) {
    SkyPositions sh;
    sh.ra_deg.resize(b.size());
    sh.dec_deg.resize(b.size());
    const double pa = 360.0 * static_cast<double>(s) / static_cast<double>(ns);
    const double dist = shift_radii[s] * radius_arcsec / 3600.0;
    tbb::parallel_for(std::size_t{0}, b.size(), [&](std::size_t i) {
      if (!valid_position(b.ra_deg[i], b.dec_deg[i])) {
        sh.ra_deg[i] = sh.dec_deg[i] = std::nan("");
        return;
      }
      offset_position(b.ra_deg[i], b.dec_deg[i], pa, dist, sh.ra_deg[i], sh.dec_deg[i]);
    });
    ce.per_shift.push_back(match_catalogues(a, sh, o).pairs.size());
  }
  double sum = 0;
  for (auto v : ce.per_shift) sum += static_cast<double>(v);
  ce.expected_chance = sum / static_cast<double>(ns);
  if (ns >= 2) {
    double ss = 0;
    for (auto v : ce.per_shift) ss += (static_cast<double>(v) - ce.expected_chance) * (static_cast<double>(v) - ce.expected_chance);
    ce.expected_chance_err = std::sqrt(ss / static_cast<double>(ns - 1) / static_cast<double>(ns));
  }
  return ce;
}

FluxRatioSummary flux_ratio_summary(const std::vector<double>& flux_a, const std::vector<double>& flux_b,
                                    const std::vector<MatchPair>& pairs, double freq_a_hz, double freq_b_hz,
                                    double alpha) {
  FluxRatioSummary s;
  // S ∝ nu^alpha: B's flux density predicted at A's frequency is S_B (nu_A/nu_B)^alpha.
  double scale = 1.0;
  if (freq_a_hz > 0 && freq_b_hz > 0 && freq_a_hz != freq_b_hz) scale = std::pow(freq_a_hz / freq_b_hz, alpha);
  std::vector<double> r;
  for (const auto& p : pairs) {
    const double fa = flux_a[p.a], fb = flux_b[p.b];
    if (!(fa > 0) || !(fb > 0) || !std::isfinite(fa) || !std::isfinite(fb)) continue;
    r.push_back(fa / (fb * scale));
  }
  s.n = r.size();
  if (r.empty()) return s;
  s.median_ratio = median_of(r);
  s.robust_scatter = robust_sigma(r, s.median_ratio);
  return s;
}

// ---- likelihood-ratio counterparts (skerry/likelihood_ratio.h) ----------------------------

namespace {

/// Combined covariance S = S_A + S_B + sys^2 I [arcsec^2] (B without errors: 0).
Eigen::Matrix2d combined_cov(const SkyPositions& a, std::size_t i, const SkyPositions& b, std::size_t j, double sys2) {
  Eigen::Matrix2d s = error_cov(a, i) + sys2 * Eigen::Matrix2d::Identity();
  if (!b.err_east_arcsec.empty()) s += error_cov(b, j);
  return s;
}

}  // namespace

LikelihoodRatioResult likelihood_ratio_match(const SkyPositions& a, const SkyPositions& b,
                                             const std::vector<double>& b_mag, const LikelihoodRatioOptions& opt) {
  if (!(opt.radius_arcsec > 0.0) || !std::isfinite(opt.radius_arcsec))
    throw std::invalid_argument("match radius must be a positive number of arcsec");
  if (!(opt.systematic_arcsec >= 0.0) || !std::isfinite(opt.systematic_arcsec))
    throw std::invalid_argument("systematic error must be >= 0");
  if (!(opt.mag_bin > 0.0) || !std::isfinite(opt.mag_bin)) throw std::invalid_argument("magnitude bin must be > 0");
  if (opt.background_shifts < 1 || opt.background_shifts > 1000)
    throw std::invalid_argument("background shifts must lie in 1..1000");
  if (opt.q0_radii < 2 || opt.q0_radii > 1000) throw std::invalid_argument("Q0 radii must lie in 2..1000");
  if (!std::isnan(opt.q0) && !(opt.q0 > 0.0 && opt.q0 <= 1.0)) throw std::invalid_argument("Q0 must lie in (0, 1]");
  if (a.dec_deg.size() != a.ra_deg.size() || b.dec_deg.size() != b.ra_deg.size())
    throw std::invalid_argument("RA and Dec vectors differ in length");
  check_errors(a, "A");
  if (!b.err_east_arcsec.empty() || !b.err_north_arcsec.empty()) check_errors(b, "B");
  if (b_mag.size() != b.size()) throw std::invalid_argument("magnitude column length differs from catalogue B");

  LikelihoodRatioResult res;
  const double radius = opt.radius_arcsec, sys2 = opt.systematic_arcsec * opt.systematic_arcsec;
  const std::size_t na = a.size(), nb = b.size();

  // B rows usable as candidates: valid position and finite magnitude.
  SkyPositions bc;
  bc.ra_deg = b.ra_deg;
  bc.dec_deg = b.dec_deg;
  double mag_lo = std::numeric_limits<double>::infinity(), mag_hi = -mag_lo;
  for (std::size_t j = 0; j < nb; ++j) {
    if (!valid_position(b.ra_deg[j], b.dec_deg[j])) {
      ++res.b_invalid;
      continue;
    }
    if (!std::isfinite(b_mag[j])) {
      ++res.b_no_mag;
      bc.ra_deg[j] = bc.dec_deg[j] = std::nan("");
      continue;
    }
    mag_lo = std::min(mag_lo, b_mag[j]);
    mag_hi = std::max(mag_hi, b_mag[j]);
  }
  // Median per-coordinate error of B, sqrt(median((e_E^2 + e_N^2) / 2)), for F(r).
  if (!b.err_east_arcsec.empty()) {
    std::vector<double> v;
    v.reserve(nb);
    for (std::size_t j = 0; j < nb; ++j)
      if (std::isfinite(bc.ra_deg[j])) {
        const double e2 = 0.5 * (b.err_east_arcsec[j] * b.err_east_arcsec[j] + b.err_north_arcsec[j] * b.err_north_arcsec[j]);
        if (std::isfinite(e2)) v.push_back(e2);
      }
    if (!v.empty()) {
      const std::size_t h = v.size() / 2;
      std::nth_element(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(h), v.end());
      res.b_median_error_arcsec = std::sqrt(v[h]);
    }
  }
  // Magnitude bins of width mag_bin from floor(min / bin) * bin.
  std::size_t nbins = 1;
  double edge0 = 0.0;
  if (std::isfinite(mag_lo)) {
    edge0 = std::floor(mag_lo / opt.mag_bin) * opt.mag_bin;
    const double nbf = std::floor((mag_hi - edge0) / opt.mag_bin) + 1.0;
    if (nbf > 100000) throw std::invalid_argument("magnitude bin too small for the magnitude range (more than 10^5 bins)");
    nbins = static_cast<std::size_t>(nbf);
  }
  auto bin_of = [&](double m) {
    const double x = std::floor((m - edge0) / opt.mag_bin);
    return static_cast<std::size_t>(std::clamp(x, 0.0, static_cast<double>(nbins - 1)));
  };

  // A rows usable: valid position and a positive-definite S_A + sys^2 I.
  SkyPositions au;
  au.ra_deg.assign(na, std::nan(""));
  au.dec_deg.assign(na, std::nan(""));
  std::vector<double> sigma2(na, 0.0);  // circularised combined variance per coordinate [arcsec^2]
  for (std::size_t i = 0; i < na; ++i) {
    if (!valid_position(a.ra_deg[i], a.dec_deg[i])) {
      ++res.a_invalid;
      continue;
    }
    const Eigen::Matrix2d s = error_cov(a, i) + sys2 * Eigen::Matrix2d::Identity();
    const double det = s(0, 0) * s(1, 1) - s(0, 1) * s(1, 0);
    if (!(det > 0.0) || !std::isfinite(det) || !std::isfinite(s.trace())) {
      ++res.a_no_error;
      continue;
    }
    au.ra_deg[i] = a.ra_deg[i];
    au.dec_deg[i] = a.dec_deg[i];
    sigma2[i] = 0.5 * s.trace() + res.b_median_error_arcsec * res.b_median_error_arcsec;
    ++res.n_a_used;
  }

  SkyIndex idx(bc, chord_bound(radius));
  const double inf = std::numeric_limits<double>::infinity();

  // 1. Candidates around the A positions (per block, rows in cell-key order).
  std::vector<double> nearest_a(na, inf);
  std::vector<std::vector<LrCandidate>> block_cands(n_blocks(au));
  for_each_row(au, idx, radius, [&](std::size_t blk, std::size_t i, std::vector<Cand>& cands) {
    const double ra = au.ra_deg[i], dec = au.dec_deg[i];
    auto& out = block_cands[blk];
    for (const auto& c : cands) {
      const auto j = static_cast<std::size_t>(c.b);
      const double sep = separation_deg(ra, dec, b.ra_deg[j], b.dec_deg[j]) * 3600.0;
      if (!(sep <= radius)) continue;
      nearest_a[i] = std::min(nearest_a[i], sep);
      // D in the tangent plane at A (east, north) [arcsec]; d^2 = D^T S^-1 D;
      // f(r) = exp(-d^2/2) / (2 pi sqrt(det S)), the bivariate normal density
      // of the offset (REF-LR-01).
      double xi = 0, eta = 0;
      gnomonic_offset(ra, dec, b.ra_deg[j], b.dec_deg[j], xi, eta);
      const Eigen::Vector2d d(xi * kArcsecPerRad, eta * kArcsecPerRad);
      const Eigen::Matrix2d s2 = combined_cov(a, i, b, j, sys2);
      const double det = s2(0, 0) * s2(1, 1) - s2(0, 1) * s2(1, 0);
      if (!(det > 0.0) || !std::isfinite(det)) continue;
      Eigen::Matrix2d inv;
      inv << s2(1, 1), -s2(0, 1), -s2(1, 0), s2(0, 0);
      inv /= det;
      const double dd2 = std::max(0.0, d.dot(inv * d));
      LrCandidate lc;
      lc.a = static_cast<std::int64_t>(i);
      lc.b = c.b;
      lc.sep_arcsec = sep;
      lc.pa_deg = position_angle_deg(ra, dec, b.ra_deg[j], b.dec_deg[j]);
      lc.norm_sep = std::sqrt(dd2);
      lc.mag = b_mag[j];
      lc.f_r = std::exp(-0.5 * dd2) / (2.0 * kPi * std::sqrt(det));
      out.push_back(lc);
    }
  });
  std::vector<LrCandidate> cands;
  {
    std::size_t total = 0;
    for (const auto& v : block_cands) total += v.size();
    cands.reserve(total);
    for (auto& v : block_cands) {
      cands.insert(cands.end(), v.begin(), v.end());
      std::vector<LrCandidate>().swap(v);
    }
  }

  // 2. Background positions: A shifted by (4 + s mod 4) radii at PA 360 s / S.
  const auto ns = static_cast<std::size_t>(opt.background_shifts);
  std::vector<std::int64_t> bg_hist(nbins, 0);
  std::vector<double> nearest_bg;
  nearest_bg.reserve(res.n_a_used * ns);
  for (std::size_t s = 0; s < ns; ++s) {
    SkyPositions sh;
    sh.ra_deg.assign(na, std::nan(""));
    sh.dec_deg.assign(na, std::nan(""));
    const double pa = 360.0 * static_cast<double>(s) / static_cast<double>(ns);
    const double dist = (4.0 + static_cast<double>(s % 4)) * radius / 3600.0;
    tbb::parallel_for(std::size_t{0}, na, [&](std::size_t i) {
      if (std::isfinite(au.ra_deg[i])) offset_position(au.ra_deg[i], au.dec_deg[i], pa, dist, sh.ra_deg[i], sh.dec_deg[i]);
    });
    std::vector<double> nearest(na, inf);
    std::vector<std::vector<std::int64_t>> hist(n_blocks(sh), std::vector<std::int64_t>());
    for_each_row(sh, idx, radius, [&](std::size_t blk, std::size_t i, std::vector<Cand>& cs) {
      auto& h = hist[blk];
      if (h.empty()) h.assign(nbins, 0);
      for (const auto& c : cs) {
        const auto j = static_cast<std::size_t>(c.b);
        const double sep = separation_deg(sh.ra_deg[i], sh.dec_deg[i], b.ra_deg[j], b.dec_deg[j]) * 3600.0;
        if (!(sep <= radius)) continue;
        nearest[i] = std::min(nearest[i], sep);
        ++h[bin_of(b_mag[j])];
      }
    });
    for (const auto& h : hist)
      for (std::size_t k = 0; k < h.size(); ++k) bg_hist[k] += h[k];
    for (std::size_t i = 0; i < na; ++i)
      if (std::isfinite(sh.ra_deg[i])) nearest_bg.push_back(nearest[i]);
  }
  res.n_background = nearest_bg.size();

  // 3. Q0 from the blanks: U_A(r) / U_bg(r) = 1 - Q0 F(r) (REF-LR-03).
  const auto nr = static_cast<std::size_t>(opt.q0_radii);
  {
    std::vector<double> na_sorted, nbg_sorted = nearest_bg;
    for (std::size_t i = 0; i < na; ++i)
      if (std::isfinite(au.ra_deg[i])) na_sorted.push_back(nearest_a[i]);
    std::sort(na_sorted.begin(), na_sorted.end());
    std::sort(nbg_sorted.begin(), nbg_sorted.end());
    auto blank_fraction = [](const std::vector<double>& v, double r) {
      // fraction of positions with no candidate within r (nearest > r)
      const auto it = std::upper_bound(v.begin(), v.end(), r);
      return v.empty() ? 0.0 : static_cast<double>(v.end() - it) / static_cast<double>(v.size());
    };
    double sfy = 0, sff = 0;
    for (std::size_t j = 1; j <= nr; ++j) {
      const double r = radius * static_cast<double>(j) / static_cast<double>(nr);
      double fsum = 0;  // in row order: independent of threads
      for (std::size_t i = 0; i < na; ++i)
        if (std::isfinite(au.ra_deg[i])) fsum += -std::expm1(-r * r / (2.0 * sigma2[i]));
      const double f = res.n_a_used ? fsum / static_cast<double>(res.n_a_used) : 0.0;
      const double ua = blank_fraction(na_sorted, r), ub = blank_fraction(nbg_sorted, r);
      res.q0_radius_arcsec.push_back(r);
      res.q0_blank_a.push_back(ua);
      res.q0_blank_background.push_back(ub);
      res.q0_model_f.push_back(f);
      if (ub > 0.0) {
        sfy += (1.0 - ua / ub) * f;
        sff += f * f;
      }
    }
    const double q0_fit = sff > 0.0 ? std::clamp(sfy / sff, 0.0, 1.0) : 0.0;
    double ss = 0;
    std::size_t nfit = 0;
    for (std::size_t j = 0; j < nr; ++j)
      if (res.q0_blank_background[j] > 0.0) {
        const double e = 1.0 - res.q0_blank_a[j] / res.q0_blank_background[j] - q0_fit * res.q0_model_f[j];
        ss += e * e;
        ++nfit;
      }
    res.q0_fit_rms = nfit ? std::sqrt(ss / static_cast<double>(nfit)) : 0.0;
    res.q0_estimated = std::isnan(opt.q0);
    res.q0 = res.q0_estimated ? q0_fit : opt.q0;
  }

  // 4. n(m), real(m), q(m) (REF-LR-02).
  const double circle = kPi * radius * radius;  // [arcsec^2]
  std::vector<std::int64_t> tot(nbins, 0);
  for (const auto& c : cands) ++tot[bin_of(c.mag)];
  res.bins.resize(nbins);
  double real_sum = 0;
  const double bg_area = static_cast<double>(res.n_background) * circle;
  for (std::size_t k = 0; k < nbins; ++k) {
    auto& bn = res.bins[k];
    bn.mag_lo = edge0 + opt.mag_bin * static_cast<double>(k);
    bn.mag_hi = bn.mag_lo + opt.mag_bin;
    bn.total = tot[k];
    bn.background = bg_hist[k];
    bn.n_m = bg_area > 0 ? static_cast<double>(bg_hist[k]) / bg_area : 0.0;
    bn.real = std::max(0.0, static_cast<double>(tot[k]) - bn.n_m * static_cast<double>(res.n_a_used) * circle);
    real_sum += bn.real;
  }
  for (auto& bn : res.bins) bn.q_m = real_sum > 0 ? res.q0 * bn.real / real_sum : 0.0;
  const double n_floor = bg_area > 0 ? 1.0 / bg_area : 1.0;  // one object: an upper limit

  // 5. LR and reliability per A row; ranks by (LR desc, separation, B index).
  tbb::parallel_for(std::size_t{0}, cands.size(), [&](std::size_t q) {
    auto& c = cands[q];
    const auto& bn = res.bins[bin_of(c.mag)];
    c.lr = bn.q_m * c.f_r / std::max(bn.n_m, n_floor);  // LR = q(m) f(r) / n(m) (REF-LR-01)
  });
  tbb::parallel_sort(cands.begin(), cands.end(), [](const LrCandidate& x, const LrCandidate& y) {
    if (x.a != y.a) return x.a < y.a;
    if (x.lr != y.lr) return x.lr > y.lr;
    if (x.sep_arcsec != y.sep_arcsec) return x.sep_arcsec < y.sep_arcsec;
    return x.b < y.b;
  });
  for (std::size_t q = 0; q < cands.size();) {
    std::size_t e = q;
    double sum = 0;
    while (e < cands.size() && cands[e].a == cands[q].a) sum += cands[e++].lr;
    // R_j = LR_j / (sum_i LR_i + 1 - Q0) (REF-LR-01)
    const double denom = sum + (1.0 - res.q0);
    for (std::size_t t = q; t < e; ++t) {
      cands[t].reliability = denom > 0 ? cands[t].lr / denom : 0.0;
      cands[t].rank = static_cast<std::int32_t>(t - q + 1);
      cands[t].n_candidates = static_cast<std::int32_t>(e - q);
    }
    q = e;
  }
  res.candidates.swap(cands);
  return res;
}

}  // namespace skerry
