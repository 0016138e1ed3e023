// Survey merge: tile cells, HEALPix sky partitions with an overlap margin, the
// self-match check and designations. See skerry/survey.h for the design.
#include <healpix_base.h>
#include <pointing.h>
#include <rangeset.h>

#include <oneapi/tbb/parallel_for.h>
#include <oneapi/tbb/parallel_sort.h>

#include <algorithm>
#include <cmath>
#include <limits>
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
  if (!(o.margin_match_radii >= 2.0 && o.margin_match_radii <= 100.0))
    bad("margin_match_radii", o.margin_match_radii, "2 <= margin_match_radii <= 100");
}

namespace {
double margin_arcsec(const MergeOptions& o) {
  // >= 2 match radii: whether a member within one radius of a home member is
  // kept depends on its own neighbours, one more radius out. >= 2 arcsec + one
  // radius: one designation covers 0.1 s of RA (<= 1.5 arcsec) by 1 arcsec of
  // Dec, so two components sharing a name are < 1.9 arcsec apart, and whether
  // they are kept looks one radius further.
  return std::max(o.match_radius_arcsec * o.margin_match_radii, 2.0 + o.match_radius_arcsec);
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

double local_noise(const TileNoise& n, std::int64_t sort_key) {
  if (n.order < 0 || n.cells.empty()) return std::numeric_limits<double>::infinity();
  const std::int64_t cell = sort_key >> (2 * (kSortOrder - n.order));
  auto it = std::lower_bound(n.cells.begin(), n.cells.end(), cell);
  if (it == n.cells.end() || *it != cell) return std::numeric_limits<double>::infinity();
  return n.rms[static_cast<std::size_t>(it - n.cells.begin())];
}

void validate(const TileNoise& n) {
  if (n.order < -1 || n.order > kSortOrder)
    throw std::invalid_argument("noise map order " + std::to_string(n.order) + " is outside -1..29");
  if (n.cells.size() != n.rms.size()) throw std::invalid_argument("noise map: cells and values differ in number");
  for (std::size_t i = 0; i < n.cells.size(); ++i) {
    if (i > 0 && !(n.cells[i - 1] < n.cells[i])) throw std::invalid_argument("noise map: cells not sorted and unique");
    if (!(std::isfinite(n.rms[i]) && n.rms[i] > 0.0))
      throw std::invalid_argument("noise map: cell " + std::to_string(n.cells[i]) + " has no finite positive rms");
  }
}

TileNoise make_tile_noise(int order, std::vector<std::pair<std::int64_t, double>> cells) {
  std::sort(cells.begin(), cells.end());
  TileNoise n;
  n.order = order;
  for (const auto& [c, v] : cells) {
    n.cells.push_back(c);
    n.rms.push_back(v);
  }
  validate(n);
  if (n.cells.empty() || order < 0) return n;
  const T_Healpix_Base<int64> base(order, NEST);
  Vec3 c{0, 0, 0};
  std::vector<Vec3> v;
  v.reserve(n.cells.size());
  for (auto px : n.cells) {
    const vec3 u = base.pix2vec(px);
    v.push_back({u.x, u.y, u.z});
    c = {c.x + u.x, c.y + u.y, c.z + u.z};
  }
  const double cn = std::sqrt(c.x * c.x + c.y * c.y + c.z * c.z);
  double r = 3.14159265358979323846;  // cells all over the sky: the whole sphere
  if (cn > 1e-6) {
    c = {c.x / cn, c.y / cn, c.z / cn};
    double m = 0.0;
    for (const auto& x : v) m = std::max(m, chord2(x, c));
    r = 2.0 * std::asin(std::min(1.0, 0.5 * std::sqrt(m))) + base.max_pixrad();
  }
  n.cap_ra_deg = std::atan2(c.y, c.x) / kDegToRad;
  n.cap_dec_deg = std::asin(std::max(-1.0, std::min(1.0, c.z))) / kDegToRad;
  n.cap_radius_deg = r / kDegToRad;
  return n;
}

PartitionResult merge_partition(const PartitionInput& input, const std::vector<SkyPoint>& centres,
                                const MergeOptions& o, const std::vector<TileNoise>& noise) {
  validate(o);
  PartitionResult res;
  res.pixel = input.pixel;
  if (input.members.empty()) return res;
  if (centres.empty()) throw std::invalid_argument("merge_partition: no tile centres");
  if (!noise.empty() && noise.size() != centres.size())
    throw std::invalid_argument("merge_partition: " + std::to_string(noise.size()) + " noise maps for " +
                                std::to_string(centres.size()) + " tiles");
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

  // ---- Local noise of every tile at every member ---------------------------------
  // With noise maps: a tile is a candidate for the partition when its cap meets
  // the partition's cap (mean direction c, radius R: the largest angle from c to
  // a member); for each member, the tiles whose cap holds it are looked up.
  // Without: the angular distance from each tile centre, over the tiles that can
  // be nearest to some member (triangle inequality: with t0 the tile nearest to
  // c, a tile t with d(c,t) > d(c,t0) + 2R is farther than t0 from every member).
  // Candidates keep their list order, so ties still go to the lower index.
  Vec3 c{0, 0, 0};
  for (const auto& x : m) c = {c.x + x.v.x, c.y + x.v.y, c.z + x.v.z};
  const double cn = std::sqrt(c.x * c.x + c.y * c.y + c.z * c.z);
  auto angle_of_chord2 = [](double c2) { return 2.0 * std::asin(std::min(1.0, 0.5 * std::sqrt(c2))); };
  std::vector<std::size_t> cand;
  std::vector<Vec3> cand_v;
  std::vector<double> cand_r;  // cap radius [rad] (noise maps)
  const bool by_noise = !noise.empty();
  if (cn > 1e-3 * static_cast<double>(m.size())) {
    c = {c.x / cn, c.y / cn, c.z / cn};
    double r_max = 0.0;
    for (const auto& x : m) r_max = std::max(r_max, angle_of_chord2(chord2(x.v, c)));
    if (by_noise) {
      for (std::size_t i = 0; i < noise.size(); ++i) {
        if (noise[i].cap_radius_deg < 0.0) continue;
        const Vec3 t = unit(noise[i].cap_ra_deg, noise[i].cap_dec_deg);
        if (angle_of_chord2(chord2(t, c)) <= noise[i].cap_radius_deg * kDegToRad + r_max + 1e-9) cand.push_back(i);
      }
    } else {
      std::vector<double> dct(centres.size());
      double d0 = 1e300;
      for (std::size_t i = 0; i < centres.size(); ++i) {
        dct[i] = angle_of_chord2(chord2(unit(centres[i].ra_deg, centres[i].dec_deg), c));
        d0 = std::min(d0, dct[i]);
      }
      const double limit = d0 + 2.0 * r_max + 1e-9;
      for (std::size_t i = 0; i < centres.size(); ++i)
        if (dct[i] <= limit) cand.push_back(i);
    }
  } else {
    for (std::size_t i = 0; i < centres.size(); ++i)
      if (!by_noise || noise[i].cap_radius_deg >= 0.0) cand.push_back(i);
  }
  for (auto i : cand) {
    if (by_noise) {
      cand_v.push_back(unit(noise[i].cap_ra_deg, noise[i].cap_dec_deg));
      cand_r.push_back(noise[i].cap_radius_deg * kDegToRad + 1e-9);
    } else {
      cand_v.push_back(unit(centres[i].ra_deg, centres[i].dec_deg));
    }
  }
  // Per member: owned (its tile is the best at its position) and the local
  // noise of its own tile there (infinite where it has no valid data).
  const double inf = std::numeric_limits<double>::infinity();
  std::vector<char> owned(m.size(), 0), home(m.size(), 0);
  std::vector<double> own_noise(m.size(), inf);
  for (std::size_t k = 0; k < m.size(); ++k) {
    home[k] = (m[k].key >> shift) == input.pixel;
    const auto tile = static_cast<std::size_t>(m[k].c.tile);
    double best = inf;
    std::size_t best_tile = centres.size();
    for (std::size_t j = 0; j < cand.size(); ++j) {
      double q;
      if (by_noise) {
        if (angle_of_chord2(chord2(m[k].v, cand_v[j])) > cand_r[j]) continue;
        q = local_noise(noise[cand[j]], m[k].key);
      } else {
        q = chord2(m[k].v, cand_v[j]);
      }
      if (q < best) {  // strict: ties keep the lower index
        best = q;
        best_tile = cand[j];
      }
    }
    if (by_noise) {
      own_noise[k] = local_noise(noise[tile], m[k].key);
    } else {
      own_noise[k] = chord2(m[k].v, unit(centres[tile].ra_deg, centres[tile].dec_deg));
    }
    owned[k] = best_tile == tile && std::isfinite(best);
  }
  // Rank key: owned first, then own local noise, tile, row (a strict total order).
  auto better = [&](std::size_t a, std::size_t b) {
    return std::make_tuple(owned[a] ? 0 : 1, own_noise[a], m[a].c.tile, m[a].c.row) <
           std::make_tuple(owned[b] ? 0 : 1, own_noise[b], m[b].c.tile, m[b].c.row);
  };

  // ---- Neighbours from other tiles within the match radius -------------------------
  // A grid of cubes in 3-D unit-vector space (side L = 2 x the radius' chord, at
  // least 2e-6 so that indices fit 21 bits): a ball of radius <= L/2 about p
  // meets at most two cubes per axis, the one holding p and the neighbour on the
  // side of the half p lies in, so 8 cubes are searched (no special cases at RA
  // 0/360 or the poles).
  const double r_c2 = chord2_of_angle(o.match_radius_arcsec * kArcsecToRad);
  const double L = std::max(2.0 * std::sqrt(r_c2), 2e-6);
  auto gkey = [](std::int64_t x, std::int64_t y, std::int64_t z) {
    const std::int64_t off = std::int64_t{1} << 20;
    return static_cast<std::uint64_t>(x + off) << 42 | static_cast<std::uint64_t>(y + off) << 21 |
           static_cast<std::uint64_t>(z + off);
  };
  std::unordered_map<std::uint64_t, std::vector<std::uint32_t>> grid;
  grid.reserve(2 * m.size());
  for (std::size_t k = 0; k < m.size(); ++k) {
    const auto cx = static_cast<std::int64_t>(std::floor(m[k].v.x / L));
    const auto cy = static_cast<std::int64_t>(std::floor(m[k].v.y / L));
    const auto cz = static_cast<std::int64_t>(std::floor(m[k].v.z / L));
    grid[gkey(cx, cy, cz)].push_back(static_cast<std::uint32_t>(k));
  }
  auto for_neighbours = [&](std::size_t a, auto&& fn) {
    const double fx = m[a].v.x / L, fy = m[a].v.y / L, fz = m[a].v.z / L;
    const auto cx = static_cast<std::int64_t>(std::floor(fx));
    const auto cy = static_cast<std::int64_t>(std::floor(fy));
    const auto cz = static_cast<std::int64_t>(std::floor(fz));
    const std::int64_t sx = fx - static_cast<double>(cx) < 0.5 ? -1 : 1;
    const std::int64_t sy = fy - static_cast<double>(cy) < 0.5 ? -1 : 1;
    const std::int64_t sz = fz - static_cast<double>(cz) < 0.5 ? -1 : 1;
    for (int q = 0; q < 8; ++q) {
      auto it = grid.find(gkey(cx + ((q & 1) ? sx : 0), cy + ((q & 2) ? sy : 0), cz + ((q & 4) ? sz : 0)));
      if (it == grid.end()) continue;
      for (const std::uint32_t b : it->second) {
        if (b == a || m[a].c.tile == m[b].c.tile) continue;
        if (chord2(m[a].v, m[b].v) > r_c2) continue;
        fn(static_cast<std::size_t>(b));
      }
    }
  };
  // Kept: no neighbour of another tile ranks better. Decided for the home
  // members and for the margin members within one radius of them (the pair
  // check below needs those); a member's neighbours lie within one radius, so
  // inside the margin.
  std::vector<char> kept(m.size(), 0);
  for (std::size_t k = 0; k < m.size(); ++k) {
    bool beaten = false;
    for_neighbours(k, [&](std::size_t b) { beaten |= better(b, k); });
    kept[k] = !beaten;
    if (home[k]) {
      ++res.home_rows;
      if (!kept[k]) ++res.duplicates_removed;
      else if (!owned[k]) ++res.rescued_rows;
    }
  }

  // ---- Self-match check of the kept components ---------------------------------
  // Pairs of kept components from different tiles closer than the match radius,
  // counted by the partition that is home to the earlier member (catalogue
  // order), so each pair is counted exactly once over all partitions.
  for (std::size_t a = 0; a < m.size(); ++a) {
    if (!kept[a] || !home[a]) continue;
    for_neighbours(a, [&](std::size_t b) {
      if (b > a && kept[b]) ++res.residual_duplicate_pairs;
    });
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
    res.rescued.push_back(owned[k] ? 0 : 1);
  }
  return res;
}

MergeResult merge_components(const std::vector<TileComponent>& comps, const std::vector<SkyPoint>& centres,
                             const MergeOptions& o, const std::vector<TileNoise>& noise) {
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
    results[r] = merge_partition(in, centres, o, noise);
  });
  for (auto& r : results) {
    if (r.home_rows == 0) continue;
    ++out.partitions;
    out.duplicates_removed += r.duplicates_removed;
    out.rescued_rows += r.rescued_rows;
    out.residual_duplicate_pairs += r.residual_duplicate_pairs;
    out.name_collisions += r.name_collisions;
    for (std::size_t k = 0; k < r.kept.size(); ++k) {
      out.kept.push_back(r.kept[k]);
      out.names.push_back(std::move(r.names[k]));
      out.rescued.push_back(r.rescued[k]);
    }
  }
  return out;
}

}  // namespace skerry::survey
