// Survey merge: tile cells, HEALPix sky partitions with an overlap margin, the
// self-match check and designations. See skerry/survey.h for the design.
#include <healpix_base.h>
#include <pointing.h>
#include <rangeset.h>

#include <oneapi/tbb/parallel_for.h>
#include <oneapi/tbb/parallel_sort.h>

#include <algorithm>
#include <cmath>
#include <map>
#include <stdexcept>
#include <tuple>
#include <unordered_map>

#include "skerry/constants.h"
#include "skerry/sky.h"
#include "skerry/survey.h"

namespace skerry::survey {

namespace {

constexpr int kSortOrder = 29;  // finest HEALPix order of 64-bit NESTED indices
constexpr double kDegToRad = 3.14159265358979323846 / 180.0;

pointing to_pointing(double ra_deg, double dec_deg) {
  // HEALPix colatitude theta = pi/2 - Dec, longitude phi = RA (Gorski et al. 2005, sec. 4).
  double ra = std::fmod(ra_deg, 360.0);
  if (ra < 0.0) ra += 360.0;
  return pointing(0.5 * 3.14159265358979323846 - dec_deg * kDegToRad, ra * kDegToRad);
}

const T_Healpix_Base<int64>& sort_base() {
  static const T_Healpix_Base<int64> base(kSortOrder, NEST);
  return base;
}

struct Vec3 {
  double x, y, z;
};
Vec3 unit(double ra_deg, double dec_deg) {
  const double a = ra_deg * kDegToRad, d = dec_deg * kDegToRad;
  return {std::cos(d) * std::cos(a), std::cos(d) * std::sin(a), std::sin(d)};
}
/// Squared chord between unit vectors: 4 sin^2(theta/2), strictly increasing in
/// the great-circle angle theta on [0, pi], and well conditioned at small angles
/// (unlike 1 - cos theta from a dot product).
double chord2(const Vec3& a, const Vec3& b) {
  const double dx = a.x - b.x, dy = a.y - b.y, dz = a.z - b.z;
  return dx * dx + dy * dy + dz * dz;
}
double chord2_of_angle(double theta_rad) {
  const double s = 2.0 * std::sin(0.5 * theta_rad);
  return s * s;
}

/// A member of a partition with what the total order needs.
struct Member {
  TileComponent c;
  std::int64_t key;
  Vec3 v;
};
bool catalogue_less(const Member& a, const Member& b) {
  return std::tie(a.key, a.c.ra_deg, a.c.dec_deg, a.c.tile, a.c.row) <
         std::tie(b.key, b.c.ra_deg, b.c.dec_deg, b.c.tile, b.c.row);
}

}  // namespace

std::size_t nearest_tile(const std::vector<SkyPoint>& centres, const SkyPoint& p) {
  if (centres.empty()) throw std::invalid_argument("nearest_tile: no tile centres");
  const Vec3 v = unit(p.ra_deg, p.dec_deg);
  std::size_t best = 0;
  double best_c2 = chord2(v, unit(centres[0].ra_deg, centres[0].dec_deg));
  for (std::size_t i = 1; i < centres.size(); ++i) {
    const double c2 = chord2(v, unit(centres[i].ra_deg, centres[i].dec_deg));
    if (c2 < best_c2) {  // strict: ties keep the lower index
      best_c2 = c2;
      best = i;
    }
  }
  return best;
}

std::int64_t sky_sort_key(double ra_deg, double dec_deg) {
  return sort_base().ang2pix(to_pointing(ra_deg, dec_deg));
}

void validate(const MergeOptions& o) {
  auto bad = [](const std::string& opt, double v, const std::string& rule) {
    throw std::invalid_argument(opt + " = " + std::to_string(v) + " breaks " + rule);
  };
  if (!(o.partition_order >= 0 && o.partition_order <= 13))
    bad("partition_order", o.partition_order, "0 <= partition_order <= 13");
  if (!(o.match_radius_arcsec > 0.0 && o.match_radius_arcsec <= 3600.0))
    bad("match_radius_arcsec", o.match_radius_arcsec, "0 < match_radius_arcsec <= 3600");
  if (!(o.margin_match_radii >= 1.0 && o.margin_match_radii <= 100.0))
    bad("margin_match_radii", o.margin_match_radii, "1 <= margin_match_radii <= 100");
}

namespace {
double margin_arcsec(const MergeOptions& o) {
  // >= 2 arcsec: one designation covers 0.1 s of RA (<= 1.5 arcsec) by 1 arcsec of
  // Dec, so two components sharing a name are < 1.9 arcsec apart.
  return std::max(o.match_radius_arcsec * o.margin_match_radii, 2.0);
}
}  // namespace

namespace {
/// The margin is assigned per "fine" pixel at order partition_order + 3 (64 fine
/// pixels per partition): every component of fine pixel F goes to each partition
/// that overlaps the disc about F's centre with radius maxrad(F) + margin, which
/// holds the margin disc of every point of F. Conservative (never misses a
/// partition, adds a few) and one disc query per fine pixel, not per component.
int fine_order(const MergeOptions& o) { return std::min(kSortOrder, o.partition_order + 3); }

std::vector<std::int64_t> partitions_of_fine(std::int64_t fine, const MergeOptions& o) {
  const T_Healpix_Base<int64> base(o.partition_order, NEST);
  const T_Healpix_Base<int64> fb(fine_order(o), NEST);
  const double radius = fb.max_pixrad() + margin_arcsec(o) * kArcsecToRad;
  rangeset<int64> rs;
  // fact: the overlap test runs at N_side * fact (a power of 2 for NESTED).
  const int fact = static_cast<int>(std::min<std::int64_t>(8, std::int64_t{1} << (kSortOrder - o.partition_order)));
  base.query_disc_inclusive(fb.pix2ang(fine), radius, rs, fact);
  std::vector<std::int64_t> out;
  rs.toVector(out);
  out.push_back(fine >> (2 * (fine_order(o) - o.partition_order)));  // the home partition, always
  std::sort(out.begin(), out.end());
  out.erase(std::unique(out.begin(), out.end()), out.end());
  return out;
}
}  // namespace

std::vector<std::int64_t> partitions_of(double ra_deg, double dec_deg, const MergeOptions& o) {
  // The home pixel is defined from the order-29 key, so that it is exactly the
  // prefix of the catalogue sort key (never a different pixel from rounding).
  return partitions_of_fine(sky_sort_key(ra_deg, dec_deg) >> (2 * (kSortOrder - fine_order(o))), o);
}

std::int64_t scatter_cell(std::int64_t sort_key, const MergeOptions& o) {
  return sort_key >> (2 * (kSortOrder - fine_order(o)));
}
std::vector<std::int64_t> partitions_of_cell(std::int64_t cell, const MergeOptions& o) {
  return partitions_of_fine(cell, o);
}
std::int64_t home_partition(std::int64_t sort_key, const MergeOptions& o) {
  return sort_key >> (2 * (kSortOrder - o.partition_order));
}

PartitionResult merge_partition(const PartitionInput& input, const std::vector<SkyPoint>& centres,
                                const MergeOptions& o) {
  validate(o);
  PartitionResult res;
  res.pixel = input.pixel;
  if (input.members.empty()) return res;
  if (centres.empty()) throw std::invalid_argument("merge_partition: no tile centres");
  const int shift = 2 * (kSortOrder - o.partition_order);

  std::vector<Member> m;
  m.reserve(input.members.size());
  for (const auto& c : input.members) {
    if (c.tile < 0 || static_cast<std::size_t>(c.tile) >= centres.size())
      throw std::invalid_argument("merge_partition: component of tile " + std::to_string(c.tile) +
                                  " outside the tile list");
    m.push_back({c, sky_sort_key(c.ra_deg, c.dec_deg), unit(c.ra_deg, c.dec_deg)});
  }
  std::sort(m.begin(), m.end(), catalogue_less);

  // ---- Cell selection --------------------------------------------------------
  // Candidate tiles: with c the partition's mean direction and R the largest
  // angle from c to a member, a tile t can be nearest to some member p only if
  // d(c,t) <= d(c,t0) + 2R, t0 being the tile nearest to c (triangle
  // inequality: d(p,t) >= d(c,t) - R > d(c,t0) + R >= d(p,t0)). Candidates keep
  // their list order, so ties still go to the lower index: the same answer as a
  // scan of every tile.
  Vec3 c{0, 0, 0};
  for (const auto& x : m) c = {c.x + x.v.x, c.y + x.v.y, c.z + x.v.z};
  const double cn = std::sqrt(c.x * c.x + c.y * c.y + c.z * c.z);
  std::vector<std::size_t> cand;
  if (cn > 1e-3 * static_cast<double>(m.size())) {
    c = {c.x / cn, c.y / cn, c.z / cn};
    auto ang = [&](const Vec3& a) { return 2.0 * std::asin(std::min(1.0, 0.5 * std::sqrt(chord2(a, c)))); };
    double r_max = 0.0;
    for (const auto& x : m) r_max = std::max(r_max, ang(x.v));
    std::vector<double> dct(centres.size());
    double d0 = 1e300;
    for (std::size_t i = 0; i < centres.size(); ++i) {
      dct[i] = ang(unit(centres[i].ra_deg, centres[i].dec_deg));
      d0 = std::min(d0, dct[i]);
    }
    // + 2 match radii: the candidates also hold every tile within 2 r of being
    // nearest, which the boundary test below needs.
    const double limit = d0 + 2.0 * r_max + 2.0 * o.match_radius_arcsec * kArcsecToRad + 1e-9;
    for (std::size_t i = 0; i < centres.size(); ++i)
      if (dct[i] <= limit) cand.push_back(i);
  } else {
    for (std::size_t i = 0; i < centres.size(); ++i) cand.push_back(i);
  }
  std::vector<Vec3> cand_v;
  for (auto i : cand) cand_v.push_back(unit(centres[i].ra_deg, centres[i].dec_deg));

  // near_edge: the second-nearest tile centre is within 2 match radii of the
  // nearest one's distance. Two kept components of different tiles A and B
  // closer than r are both near an edge: d(a, cB) <= d(b, cB) + r <= d(b, cA) + r
  // <= d(a, cA) + 2r (triangle inequality, b in B's cell). Only they enter the
  // self-match below.
  const double two_r = 2.0 * o.match_radius_arcsec * kArcsecToRad;
  auto angle_of_chord2 = [](double c2) { return 2.0 * std::asin(std::min(1.0, 0.5 * std::sqrt(c2))); };
  std::vector<char> kept(m.size(), 0), home(m.size(), 0), near_edge(m.size(), 0);
  for (std::size_t k = 0; k < m.size(); ++k) {
    home[k] = (m[k].key >> shift) == input.pixel;
    std::size_t best = 0;
    double best_c2 = chord2(m[k].v, cand_v[0]), second_c2 = 1e300;
    for (std::size_t j = 1; j < cand.size(); ++j) {
      const double c2 = chord2(m[k].v, cand_v[j]);
      if (c2 < best_c2) {
        second_c2 = best_c2;
        best_c2 = c2;
        best = j;
      } else if (c2 < second_c2) {
        second_c2 = c2;
      }
    }
    kept[k] = static_cast<std::size_t>(m[k].c.tile) == cand[best];
    near_edge[k] = second_c2 < 1e300 && angle_of_chord2(second_c2) - angle_of_chord2(best_c2) <= two_r + 1e-12;
    if (home[k]) {
      ++res.home_rows;
      if (!kept[k]) ++res.dropped_by_cell;
    }
  }

  // ---- Self-match check of the kept components -------------------------------
  // Pairs from different tiles closer than the match radius, found through a
  // grid of cubes in 3-D unit-vector space with the side h of the radius' chord:
  // two points closer than the radius lie in the same or adjacent cubes (no
  // special cases at RA 0/360 or the poles). A pair is counted by the partition
  // that is home to its earlier member (catalogue order), so that each pair is
  // counted exactly once over all partitions.
  {
    const double r_c2 = chord2_of_angle(o.match_radius_arcsec * kArcsecToRad);
    // Cube side L = 2 x chord (>= 2e-6 so that indices fit 21 bits): a ball of
    // radius <= L/2 about p meets at most two cubes per axis, the one holding p
    // and the neighbour on the side of the half p lies in: 8 cubes to search.
    const double L = std::max(2.0 * std::sqrt(r_c2), 2e-6);
    auto key = [](std::int64_t x, std::int64_t y, std::int64_t z) {
      const std::int64_t off = std::int64_t{1} << 20;
      return static_cast<std::uint64_t>(x + off) << 42 | static_cast<std::uint64_t>(y + off) << 21 |
             static_cast<std::uint64_t>(z + off);
    };
    std::unordered_map<std::uint64_t, std::vector<std::uint32_t>> grid;
    grid.reserve(2 * m.size());
    for (std::size_t k = 0; k < m.size(); ++k) {
      if (!kept[k] || !near_edge[k]) continue;
      const auto cx = static_cast<std::int64_t>(std::floor(m[k].v.x / L));
      const auto cy = static_cast<std::int64_t>(std::floor(m[k].v.y / L));
      const auto cz = static_cast<std::int64_t>(std::floor(m[k].v.z / L));
      grid[key(cx, cy, cz)].push_back(static_cast<std::uint32_t>(k));
    }
    for (std::size_t a = 0; a < m.size(); ++a) {
      if (!kept[a] || !home[a] || !near_edge[a]) continue;
      const double fx = m[a].v.x / L, fy = m[a].v.y / L, fz = m[a].v.z / L;
      const auto cx = static_cast<std::int64_t>(std::floor(fx));
      const auto cy = static_cast<std::int64_t>(std::floor(fy));
      const auto cz = static_cast<std::int64_t>(std::floor(fz));
      const std::int64_t sx = fx - static_cast<double>(cx) < 0.5 ? -1 : 1;
      const std::int64_t sy = fy - static_cast<double>(cy) < 0.5 ? -1 : 1;
      const std::int64_t sz = fz - static_cast<double>(cz) < 0.5 ? -1 : 1;
      for (int q = 0; q < 8; ++q) {
        auto it = grid.find(key(cx + ((q & 1) ? sx : 0), cy + ((q & 2) ? sy : 0), cz + ((q & 4) ? sz : 0)));
        if (it == grid.end()) continue;
        for (const std::uint32_t b : it->second) {
          if (b <= a) continue;  // each pair once, from its earlier member a (m is in catalogue order)
          if (m[a].c.tile == m[b].c.tile) continue;
          if (chord2(m[a].v, m[b].v) > r_c2) continue;
          ++res.residual_duplicate_pairs;
        }
      }
    }
  }

  // ---- Designations and collision suffixes -----------------------------------
  // Components share a designation exactly when they share its integer key:
  // sort (key, catalogue index) pairs; a run of equal keys is one designation,
  // its members in catalogue order.
  std::vector<std::pair<std::int64_t, std::uint32_t>> dk;
  dk.reserve(m.size());
  for (std::size_t k = 0; k < m.size(); ++k)
    if (kept[k]) dk.emplace_back(designation_key(m[k].c.ra_deg, m[k].c.dec_deg), static_cast<std::uint32_t>(k));
  std::sort(dk.begin(), dk.end());
  std::vector<std::int64_t> rank(m.size(), -1);  // -1: the designation is unique
  for (std::size_t b = 0; b < dk.size();) {
    std::size_t e = b;
    while (e < dk.size() && dk[e].first == dk[b].first) ++e;
    if (e - b > 1)
      for (std::size_t q = b; q < e; ++q) rank[dk[q].second] = static_cast<std::int64_t>(q - b);
    b = e;
  }
  for (std::size_t k = 0; k < m.size(); ++k) {
    if (!kept[k] || !home[k]) continue;
    std::string name = designation(o.designation_prefix, m[k].c.ra_deg, m[k].c.dec_deg);
    if (rank[k] >= 0) {
      name += collision_suffix(static_cast<std::size_t>(rank[k]));
      ++res.name_collisions;
    }
    res.kept.push_back(m[k].c);
    res.names.push_back(std::move(name));
  }
  return res;
}

MergeResult merge_components(const std::vector<TileComponent>& comps, const std::vector<SkyPoint>& centres,
                             const MergeOptions& o) {
  validate(o);
  MergeResult out;
  out.input_rows = comps.size();
  if (comps.empty()) return out;
  // Scatter: (partition pixel, component index) pairs, unique, sorted. One disc
  // query per distinct fine pixel (partitions_of_fine).
  const int fshift = 2 * (kSortOrder - fine_order(o));
  std::vector<std::int64_t> fine(comps.size());
  oneapi::tbb::parallel_for(std::size_t{0}, comps.size(), [&](std::size_t i) {
    fine[i] = sky_sort_key(comps[i].ra_deg, comps[i].dec_deg) >> fshift;
  });
  std::vector<std::int64_t> distinct = fine;
  oneapi::tbb::parallel_sort(distinct.begin(), distinct.end());
  distinct.erase(std::unique(distinct.begin(), distinct.end()), distinct.end());
  std::vector<std::vector<std::int64_t>> parts(distinct.size());
  oneapi::tbb::parallel_for(std::size_t{0}, distinct.size(), [&](std::size_t i) {
    parts[i] = partitions_of_fine(distinct[i], o);
  });
  std::vector<std::pair<std::int64_t, std::size_t>> pairs;
  pairs.reserve(comps.size() * 2);
  for (std::size_t i = 0; i < comps.size(); ++i) {
    const auto f = static_cast<std::size_t>(std::lower_bound(distinct.begin(), distinct.end(), fine[i]) - distinct.begin());
    for (auto px : parts[f]) pairs.emplace_back(px, i);
  }
  parts.clear();
  fine.clear();
  oneapi::tbb::parallel_sort(pairs.begin(), pairs.end());  // keys unique: deterministic

  std::vector<std::pair<std::size_t, std::size_t>> ranges;  // [begin, end) per partition
  for (std::size_t b = 0; b < pairs.size();) {
    std::size_t e = b;
    while (e < pairs.size() && pairs[e].first == pairs[b].first) ++e;
    ranges.emplace_back(b, e);
    b = e;
  }
  std::vector<PartitionResult> results(ranges.size());
  oneapi::tbb::parallel_for(std::size_t{0}, ranges.size(), [&](std::size_t r) {
    PartitionInput in;
    in.pixel = pairs[ranges[r].first].first;
    for (std::size_t k = ranges[r].first; k < ranges[r].second; ++k) in.members.push_back(comps[pairs[k].second]);
    results[r] = merge_partition(in, centres, o);
  });
  for (auto& r : results) {
    if (r.home_rows == 0) continue;
    ++out.partitions;
    out.dropped_by_cell += r.dropped_by_cell;
    out.residual_duplicate_pairs += r.residual_duplicate_pairs;
    out.name_collisions += r.name_collisions;
    for (std::size_t k = 0; k < r.kept.size(); ++k) {
      out.kept.push_back(r.kept[k]);
      out.names.push_back(std::move(r.names[k]));
    }
  }
  return out;
}

}  // namespace skerry::survey
