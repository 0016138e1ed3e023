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

std::vector<std::int64_t> partitions_of(double ra_deg, double dec_deg, const MergeOptions& o) {
  const T_Healpix_Base<int64> base(o.partition_order, NEST);
  const pointing p = to_pointing(ra_deg, dec_deg);
  rangeset<int64> rs;
  // fact: the overlap test runs at N_side * fact (a power of 2 for NESTED); 64
  // keeps false positives to a sliver next to each pixel at 3 us per query.
  const int fact = static_cast<int>(std::min<std::int64_t>(64, std::int64_t{1} << (kSortOrder - o.partition_order)));
  base.query_disc_inclusive(p, margin_arcsec(o) * kArcsecToRad, rs, fact);
  std::vector<std::int64_t> out;
  rs.toVector(out);
  // The home pixel is defined from the order-29 key, so that it is exactly the
  // prefix of the catalogue sort key (never a different pixel from rounding).
  out.push_back(sky_sort_key(ra_deg, dec_deg) >> (2 * (kSortOrder - o.partition_order)));
  std::sort(out.begin(), out.end());
  out.erase(std::unique(out.begin(), out.end()), out.end());
  return out;
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
    const double limit = d0 + 2.0 * r_max + 1e-9;  // slack: conservative (keeps extra candidates)
    for (std::size_t i = 0; i < centres.size(); ++i)
      if (dct[i] <= limit) cand.push_back(i);
  } else {
    for (std::size_t i = 0; i < centres.size(); ++i) cand.push_back(i);
  }
  std::vector<Vec3> cand_v;
  for (auto i : cand) cand_v.push_back(unit(centres[i].ra_deg, centres[i].dec_deg));

  std::vector<char> kept(m.size(), 0), home(m.size(), 0);
  for (std::size_t k = 0; k < m.size(); ++k) {
    home[k] = (m[k].key >> shift) == input.pixel;
    std::size_t best = 0;
    double best_c2 = chord2(m[k].v, cand_v[0]);
    for (std::size_t j = 1; j < cand.size(); ++j) {
      const double c2 = chord2(m[k].v, cand_v[j]);
      if (c2 < best_c2) {
        best_c2 = c2;
        best = j;
      }
    }
    kept[k] = static_cast<std::size_t>(m[k].c.tile) == cand[best];
    if (home[k]) {
      ++res.home_rows;
      if (!kept[k]) ++res.dropped_by_cell;
    }
  }

  // ---- Self-match check of the kept components -------------------------------
  // Pairs from different tiles closer than the match radius. Sweep in Dec: a pair
  // closer than r differs by less than r in Dec. A pair is counted by the
  // partition that is home to its earlier member (catalogue order), so that each
  // pair is counted exactly once over all partitions.
  {
    std::vector<std::size_t> idx;
    for (std::size_t k = 0; k < m.size(); ++k)
      if (kept[k]) idx.push_back(k);
    std::sort(idx.begin(), idx.end(), [&](std::size_t a, std::size_t b) {
      return std::tie(m[a].c.dec_deg, a) < std::tie(m[b].c.dec_deg, b);
    });
    const double r_deg = o.match_radius_arcsec / 3600.0;
    const double r_c2 = chord2_of_angle(o.match_radius_arcsec * kArcsecToRad);
    for (std::size_t i = 0; i < idx.size(); ++i) {
      for (std::size_t j = i + 1; j < idx.size(); ++j) {
        const std::size_t a = idx[i], b = idx[j];
        if (m[b].c.dec_deg - m[a].c.dec_deg > r_deg) break;
        if (m[a].c.tile == m[b].c.tile) continue;
        if (chord2(m[a].v, m[b].v) > r_c2) continue;
        const std::size_t first = std::min(a, b);  // m is in catalogue order
        if (home[first]) ++res.residual_duplicate_pairs;
      }
    }
  }

  // ---- Designations and collision suffixes -----------------------------------
  std::vector<std::string> names(m.size());
  std::map<std::string, std::vector<std::size_t>> by_name;  // members in catalogue order
  for (std::size_t k = 0; k < m.size(); ++k) {
    if (!kept[k]) continue;
    names[k] = designation(o.designation_prefix, m[k].c.ra_deg, m[k].c.dec_deg);
    by_name[names[k]].push_back(k);
  }
  for (std::size_t k = 0; k < m.size(); ++k) {
    if (!kept[k] || !home[k]) continue;
    const auto& group = by_name[names[k]];
    std::string name = names[k];
    if (group.size() > 1) {
      const auto rank = static_cast<std::size_t>(std::find(group.begin(), group.end(), k) - group.begin());
      name += collision_suffix(rank);
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
  // Scatter: (partition pixel, component index) pairs, unique, sorted.
  std::vector<std::vector<std::int64_t>> parts(comps.size());
  oneapi::tbb::parallel_for(std::size_t{0}, comps.size(), [&](std::size_t i) {
    parts[i] = partitions_of(comps[i].ra_deg, comps[i].dec_deg, o);
  });
  std::vector<std::pair<std::int64_t, std::size_t>> pairs;
  std::size_t total = 0;
  for (const auto& p : parts) total += p.size();
  pairs.reserve(total);
  for (std::size_t i = 0; i < comps.size(); ++i)
    for (auto px : parts[i]) pairs.emplace_back(px, i);
  parts.clear();
  parts.shrink_to_fit();
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
