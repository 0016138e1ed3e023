// Survey merge: tile cells, HEALPix partitions, self-match check, determinism.
#include <gtest/gtest.h>
#include <oneapi/tbb/global_control.h>

#include <algorithm>
#include <cmath>
#include <map>
#include <random>

#include "skerry/sky.h"
#include "skerry/survey.h"

using namespace skerry::survey;

// HEALPix NESTED index check values (REF-HEALPIX-01: Gorski et al. 2005, ApJ 622,
// 759; values computed with astropy-healpix). The partition pixel at order k is
// the order-29 key shifted right by 2 (29 - k) bits.
TEST(SkySortKey, HealpixCheckValues) {
  EXPECT_EQ(sky_sort_key(150.0, 2.0) >> (2 * (29 - 10)), 6978065);
  EXPECT_EQ(sky_sort_key(45.0, 41.8103148958) >> (2 * 29), 0);
  EXPECT_EQ(sky_sort_key(0.0, 0.0) >> (2 * 29), 4);
  EXPECT_EQ(sky_sort_key(135.0, -41.8103148958) >> (2 * 29), 9);
}

// The cell is decided by great-circle distance to tile centres; exact ties go
// to the lower index (definition in skerry/survey.h).
TEST(NearestTile, DistanceAndTies) {
  std::vector<SkyPoint> c{{201.0, -38.0}, {202.0, -38.0}, {201.0, -39.0}};
  EXPECT_EQ(nearest_tile(c, {201.1, -38.1}), 0u);
  EXPECT_EQ(nearest_tile(c, {201.9, -38.1}), 1u);
  EXPECT_EQ(nearest_tile(c, {201.1, -38.9}), 2u);
  // Mirror-symmetric centres about the equator: the equator is an exact tie.
  std::vector<SkyPoint> t{{10.0, 1.0}, {10.0, -1.0}};
  EXPECT_EQ(nearest_tile(t, {10.0, 0.0}), 0u);
  std::vector<SkyPoint> t2{{10.0, -1.0}, {10.0, 1.0}};
  EXPECT_EQ(nearest_tile(t2, {10.0, 0.0}), 0u);
  // Duplicate centres: the first one owns the cell.
  std::vector<SkyPoint> d{{5.0, 5.0}, {6.0, 5.0}, {6.0, 5.0}};
  EXPECT_EQ(nearest_tile(d, {6.0, 5.1}), 1u);
  // Across RA 0/360: 359.9 is nearer to 0.1 than 359.0 is.
  std::vector<SkyPoint> w{{359.0, 0.0}, {0.1, 0.0}};
  EXPECT_EQ(nearest_tile(w, {359.9, 0.0}), 1u);
}

// The margin never misses a neighbour: for any b within the match radius of a,
// b belongs to a's home partition (what the self-match and collision suffixes
// rely on). Checked near pixel boundaries at several orders, including a pole.
TEST(PartitionsOf, MarginContainsEveryNeighbour) {
  std::mt19937_64 rng(7);
  std::uniform_real_distribution<double> u(-1.0, 1.0);
  for (int order : {2, 5, 8}) {
    MergeOptions o;
    o.partition_order = order;
    o.match_radius_arcsec = 5.0;
    o.margin_match_radii = 1.0;
    for (double dec0 : {-38.6, 0.0, 41.8103148958, 89.99}) {
      for (int i = 0; i < 2000; ++i) {
        const double ra = 201.25 + 2.0 * u(rng), dec = std::clamp(dec0 + 0.5 * u(rng), -90.0, 90.0);
        // b: 4.9 arcsec away in a random direction.
        const double pa = 180.0 * u(rng), sep = 4.9 / 3600.0;
        double xi = sep * std::sin(pa * M_PI / 180.0) * M_PI / 180.0, eta = sep * std::cos(pa * M_PI / 180.0) * M_PI / 180.0;
        double rb, db;
        skerry::gnomonic_inverse(ra, dec, xi, eta, rb, db);
        ASSERT_LT(skerry::separation_deg(ra, dec, rb, db) * 3600.0, 5.0);
        const std::int64_t home_a = sky_sort_key(ra, dec) >> (2 * (29 - order));
        auto pb = partitions_of(rb, db, o);
        ASSERT_TRUE(std::binary_search(pb.begin(), pb.end(), home_a)) << order << " " << ra << " " << dec;
      }
    }
  }
}

namespace {
// A synthetic survey: a 4 x 3 grid of tile centres 0.5 deg apart with radius
// 0.4 deg (overlapping), truth positions uniform on the sphere cap; each tile
// reports every truth inside its radius with its own small position jitter (as
// independent measurements would), plus rows of one close blended pair.
struct Synthetic {
  std::vector<SkyPoint> centres;
  std::vector<TileComponent> comps;
  std::vector<std::size_t> truth_of;  // truth index per component
  std::vector<SkyPoint> truth;
};
Synthetic make_survey(unsigned seed, std::size_t n_truth) {
  Synthetic s;
  for (int j = 0; j < 3; ++j)
    for (int i = 0; i < 4; ++i)
      s.centres.push_back({201.25 + (i - 1.5) * 0.5 / std::cos(38.6 * M_PI / 180.0), -38.6 + (j - 1) * 0.5});
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> ura(199.9, 202.6), usd(std::sin(-39.5 * M_PI / 180), std::sin(-37.7 * M_PI / 180));
  std::normal_distribution<double> jit(0.0, 0.3 / 3600.0);
  for (std::size_t k = 0; k < n_truth; ++k) s.truth.push_back({ura(rng), std::asin(usd(rng)) * 180.0 / M_PI});
  // A blended pair 2 arcsec apart (both real, same tile measures both).
  s.truth.push_back({201.3, -38.5});
  s.truth.push_back({201.3 + 2.0 / 3600.0 / std::cos(38.5 * M_PI / 180.0), -38.5});
  for (std::size_t t = 0; t < s.centres.size(); ++t) {
    std::int64_t row = 0;
    for (std::size_t k = 0; k < s.truth.size(); ++k) {
      if (skerry::separation_deg(s.centres[t].ra_deg, s.centres[t].dec_deg, s.truth[k].ra_deg, s.truth[k].dec_deg) > 0.4)
        continue;
      s.comps.push_back({s.truth[k].ra_deg + jit(rng) / std::cos(s.truth[k].dec_deg * M_PI / 180.0),
                         s.truth[k].dec_deg + jit(rng), static_cast<std::int32_t>(t), row++});
      s.truth_of.push_back(k);
    }
  }
  return s;
}
}  // namespace

// Every true source inside the survey appears exactly once (no duplicate, none
// lost); a kept copy not marked rescued comes from the tile owning its position
// (without noise maps: the nearest tile centre); a blended pair in one tile is
// not merged.
TEST(MergeComponents, EachSourceOnceFromItsOwner) {
  auto s = make_survey(11, 3000);
  MergeOptions o;
  o.match_radius_arcsec = 5.0;
  auto r = merge_components(s.comps, s.centres, o);
  EXPECT_EQ(r.input_rows, s.comps.size());
  std::map<std::pair<std::int32_t, std::int64_t>, std::size_t> index;
  for (std::size_t i = 0; i < s.comps.size(); ++i) index[{s.comps[i].tile, s.comps[i].row}] = i;
  std::vector<int> times(s.truth.size(), 0);
  std::size_t rescued = 0;
  ASSERT_EQ(r.rescued.size(), r.kept.size());
  for (std::size_t q = 0; q < r.kept.size(); ++q) {
    const auto& k = r.kept[q];
    const std::size_t i = index.at({k.tile, k.row});
    ++times[s.truth_of[i]];
    if (r.rescued[q]) {
      ++rescued;
    } else {
      EXPECT_EQ(nearest_tile(s.centres, {k.ra_deg, k.dec_deg}), static_cast<std::size_t>(k.tile));
    }
  }
  std::vector<int> seen(s.truth.size(), 0);
  for (auto t : s.truth_of) seen[t] = 1;
  for (std::size_t k = 0; k < s.truth.size(); ++k)
    if (seen[k]) {
      EXPECT_EQ(times[k], 1) << "truth " << k;
    }
  // Rescues happen only where jitter puts two copies on opposite sides of a
  // cell boundary, each in the other's cell (< 0.2 % of the sources here).
  EXPECT_EQ(rescued, r.rescued_rows);
  EXPECT_LT(rescued, r.kept.size() / 200 + 1);
  EXPECT_EQ(r.residual_duplicate_pairs, 0u);
  EXPECT_EQ(r.duplicates_removed + r.kept.size(), s.comps.size());
  EXPECT_EQ(r.kept.size(), r.names.size());
}

namespace {
/// Noise cells of HEALPix order `order` covering the disc (centre, radius) with
/// rms rising linearly from `rms0` at the centre by `slope` per degree.
TileNoise disc_noise(const SkyPoint& c, double radius_deg, double rms0, double slope, int order) {
  std::vector<std::pair<std::int64_t, double>> cells;
  std::map<std::int64_t, double> seen;
  // Sample the disc densely; each sampled cell gets the rms at its first sample.
  const int n = 400;
  for (int j = 0; j <= n; ++j)
    for (int i = 0; i <= n; ++i) {
      const double dx = (2.0 * i / n - 1.0) * radius_deg, dy = (2.0 * j / n - 1.0) * radius_deg;
      if (dx * dx + dy * dy > radius_deg * radius_deg) continue;
      double ra, dec;
      skerry::gnomonic_inverse(c.ra_deg, c.dec_deg, dx * M_PI / 180.0, dy * M_PI / 180.0, ra, dec);
      const std::int64_t cell = sky_sort_key(ra, dec) >> (2 * (29 - order));
      seen.emplace(cell, rms0 + slope * std::sqrt(dx * dx + dy * dy));
    }
  for (const auto& [k, v] : seen) cells.emplace_back(k, v);
  return make_tile_noise(order, cells);
}
}  // namespace

// Ownership by local noise (issue: overlaps by measurement quality): tile 0 is
// quiet (20 uJy), tile 1 noisy (40 uJy) over the same field; tile 2 covers half
// of it at 10 uJy. A source detected by all keeps tile 2's copy where tile 2 has
// data, else tile 0's; a source only the noisy tile detected is kept from it,
// marked rescued; copies detected by tiles 0 and 1 only, inside tile 2's area
// (tile 2 blank-free but missed them), keep tile 0's copy, rescued.
TEST(MergeComponents, OwnershipByLocalNoiseAndRescue) {
  const SkyPoint c{150.0, 2.0};
  std::vector<SkyPoint> centres{c, c, {150.15, 2.0}};
  std::vector<TileNoise> noise{disc_noise(c, 0.3, 20e-6, 0.0, 11), disc_noise(c, 0.3, 40e-6, 0.0, 11),
                               disc_noise({150.15, 2.0}, 0.1, 10e-6, 0.0, 11)};
  std::vector<TileComponent> comps;
  auto add = [&](double ra, double dec, int tile, double jitter_arcsec) {
    const std::int64_t row = static_cast<std::int64_t>(
        std::count_if(comps.begin(), comps.end(), [&](const TileComponent& x) { return x.tile == tile; }));
    comps.push_back({ra + jitter_arcsec / 3600.0, dec, tile, row});
  };
  // A: outside tile 2, detected by 0 and 1 -> tile 0.
  add(149.9, 2.05, 0, 0.0);
  add(149.9, 2.05, 1, 0.4);
  // B: inside tile 2, detected by all three -> tile 2.
  add(150.15, 2.01, 0, 0.3);
  add(150.15, 2.01, 1, -0.3);
  add(150.15, 2.01, 2, 0.1);
  // C: outside tile 2, only the noisy tile 1 -> tile 1, rescued.
  add(149.95, 1.9, 1, 0.0);
  // D: inside tile 2, tiles 0 and 1 only -> tile 0, rescued.
  add(150.16, 1.98, 1, 0.2);
  add(150.16, 1.98, 0, 0.0);
  for (int order : {0, 6, 10}) {
    MergeOptions o;
    o.partition_order = order;
    auto r = merge_components(comps, centres, o, noise);
    ASSERT_EQ(r.kept.size(), 4u) << order;
    std::map<long, std::pair<int, bool>> got;
    for (std::size_t i = 0; i < r.kept.size(); ++i)
      got[std::lround(r.kept[i].ra_deg * 100) * 1000 + std::lround(r.kept[i].dec_deg * 100)] = {r.kept[i].tile,
                                                                                                r.rescued[i] != 0};
    EXPECT_EQ(got.at(14990 * 1000 + 205), std::make_pair(0, false));
    EXPECT_EQ(got.at(15015 * 1000 + 201), std::make_pair(2, false));
    EXPECT_EQ(got.at(14995 * 1000 + 190), std::make_pair(1, true));
    EXPECT_EQ(got.at(15016 * 1000 + 198), std::make_pair(0, true));
    EXPECT_EQ(r.duplicates_removed, 4u);
    EXPECT_EQ(r.rescued_rows, 2u);
    EXPECT_EQ(r.residual_duplicate_pairs, 0u);
  }
  // Equal noise: the lower tile index owns the position (deterministic tie-break).
  std::vector<TileNoise> flat{disc_noise(c, 0.3, 20e-6, 0.0, 11), disc_noise(c, 0.3, 20e-6, 0.0, 11),
                              disc_noise({150.15, 2.0}, 0.1, 20e-6, 0.0, 11)};
  auto r = merge_components({{149.9, 2.05, 1, 0}, {149.9, 2.05, 0, 0}}, centres, MergeOptions{}, flat);
  ASSERT_EQ(r.kept.size(), 1u);
  EXPECT_EQ(r.kept[0].tile, 0);
  EXPECT_EQ(r.rescued[0], 0);
  // A tile with no valid data at a position does not own it.
  EXPECT_TRUE(std::isinf(local_noise(noise[2], sky_sort_key(149.9, 2.05))));
  EXPECT_DOUBLE_EQ(local_noise(noise[2], sky_sort_key(150.15, 2.0)), 10e-6);
}

// Local noise rising towards each tile's edge: every kept copy is from the
// tile with the lowest noise among those that detected the source.
TEST(MergeComponents, KeptCopyFromTheLowestNoiseDetection) {
  auto s = make_survey(15, 2000);
  std::vector<TileNoise> noise;
  for (const auto& c : s.centres) noise.push_back(disc_noise(c, 0.41, 20e-6, 100e-6, 9));
  MergeOptions o;
  o.partition_order = 5;
  auto r = merge_components(s.comps, s.centres, o, noise);
  std::map<std::size_t, std::vector<std::size_t>> copies;  // truth -> component indices
  for (std::size_t i = 0; i < s.comps.size(); ++i) copies[s.truth_of[i]].push_back(i);
  std::map<std::pair<std::int32_t, std::int64_t>, std::size_t> index;
  for (std::size_t i = 0; i < s.comps.size(); ++i) index[{s.comps[i].tile, s.comps[i].row}] = i;
  std::vector<int> times(s.truth.size(), 0);
  for (const auto& k : r.kept) {
    const std::size_t i = index.at({k.tile, k.row});
    ++times[s.truth_of[i]];
    double best = 1e300;
    for (auto j : copies[s.truth_of[i]])
      best = std::min(best, local_noise(noise[static_cast<std::size_t>(s.comps[j].tile)],
                                        sky_sort_key(s.comps[j].ra_deg, s.comps[j].dec_deg)));
    EXPECT_LE(local_noise(noise[static_cast<std::size_t>(k.tile)], sky_sort_key(k.ra_deg, k.dec_deg)), best);
  }
  for (const auto& [t, v] : copies) EXPECT_EQ(times[t], 1) << "truth " << t;
  // The same with noise maps, for every partition order and thread count.
  for (int order : {2, 8}) {
    o.partition_order = order;
    auto q = merge_components(s.comps, s.centres, o, noise);
    ASSERT_EQ(q.kept.size(), r.kept.size());
    for (std::size_t i = 0; i < q.kept.size(); ++i) {
      EXPECT_EQ(q.kept[i].tile, r.kept[i].tile);
      EXPECT_EQ(q.kept[i].row, r.kept[i].row);
      EXPECT_EQ(q.rescued[i], r.rescued[i]);
    }
  }
}

// Exact positions (no jitter) on a boundary-free layout: no residual duplicates.
TEST(MergeComponents, NoResidualDuplicatesWithoutJitter) {
  auto s = make_survey(12, 2000);
  // Give every tile's copy the truth position exactly.
  for (std::size_t i = 0; i < s.comps.size(); ++i) {
    s.comps[i].ra_deg = s.truth[s.truth_of[i]].ra_deg;
    s.comps[i].dec_deg = s.truth[s.truth_of[i]].dec_deg;
  }
  auto r = merge_components(s.comps, s.centres, MergeOptions{});
  EXPECT_EQ(r.residual_duplicate_pairs, 0u);
  std::size_t distinct = 0;
  std::vector<int> seen(s.truth.size(), 0);
  for (auto t : s.truth_of) distinct += seen[t]++ == 0;
  EXPECT_EQ(r.kept.size(), distinct);
}

namespace {
bool same(const MergeResult& a, const MergeResult& b) {
  if (a.kept.size() != b.kept.size() || a.names != b.names) return false;
  for (std::size_t i = 0; i < a.kept.size(); ++i)
    if (a.kept[i].tile != b.kept[i].tile || a.kept[i].row != b.kept[i].row) return false;
  return a.residual_duplicate_pairs == b.residual_duplicate_pairs && a.name_collisions == b.name_collisions &&
         a.duplicates_removed == b.duplicates_removed && a.rescued == b.rescued;
}
}  // namespace

// Partition independence: HEALPix orders 0..9 (1 to ~10^4 partitions over the
// field) give the same catalogue, names and check counts.
TEST(MergeComponents, IndependentOfPartitionOrder) {
  auto s = make_survey(13, 3000);
  MergeOptions o;
  o.partition_order = 0;
  const auto ref = merge_components(s.comps, s.centres, o);
  ASSERT_GT(ref.kept.size(), 2000u);
  for (int order : {1, 3, 5, 7, 9}) {
    o.partition_order = order;
    auto r = merge_components(s.comps, s.centres, o);
    EXPECT_TRUE(same(ref, r)) << "order " << order;
    if (order >= 7) {
      EXPECT_GT(r.partitions, 10u);
    }
  }
}

// Thread count does not matter (oneTBB limited to 1 vs 2 threads), nor input order.
TEST(MergeComponents, IndependentOfThreadsAndInputOrder) {
  auto s = make_survey(14, 3000);
  MergeOptions o;
  o.partition_order = 6;
  MergeResult one;
  {
    oneapi::tbb::global_control gc(oneapi::tbb::global_control::max_allowed_parallelism, 1);
    one = merge_components(s.comps, s.centres, o);
  }
  MergeResult two;
  {
    oneapi::tbb::global_control gc(oneapi::tbb::global_control::max_allowed_parallelism, 2);
    auto shuffled = s.comps;
    std::mt19937 rng(3);
    std::shuffle(shuffled.begin(), shuffled.end(), rng);
    two = merge_components(shuffled, s.centres, o);
  }
  EXPECT_TRUE(same(one, two));
}

// Designation collisions: two kept components less than 1 arcsec apart in one
// tile share a designation and get suffixes a, b in catalogue order; a third,
// distinct position gets none.
TEST(MergeComponents, CollisionSuffixes) {
  std::vector<SkyPoint> c{{201.25, -38.6}};
  std::vector<TileComponent> comps{
      {201.25 + 0.01 / 3600, -38.6 - 0.2 / 3600, 0, 0},
      {201.25 + 0.02 / 3600, -38.6 - 0.5 / 3600, 0, 1},
      {201.30, -38.6, 0, 2}};
  for (int order : {0, 8, 13}) {
    MergeOptions o;
    o.partition_order = order;
    auto r = merge_components(comps, c, o);
    ASSERT_EQ(r.kept.size(), 3u);
    EXPECT_EQ(r.name_collisions, 2u);
    std::map<std::int64_t, std::string> by_row;
    for (std::size_t i = 0; i < 3; ++i) by_row[r.kept[i].row] = r.names[i];
    EXPECT_EQ(by_row[2], "SKDC J132512.0-383600");
    // Both share SKDC J132500.0-383600; their order is the catalogue order.
    EXPECT_EQ(by_row[0].substr(0, 21), "SKDC J132500.0-383600");
    EXPECT_EQ(by_row[1].substr(0, 21), "SKDC J132500.0-383600");
    EXPECT_NE(by_row[0], by_row[1]);
    EXPECT_TRUE((by_row[0].substr(21) == "a" && by_row[1].substr(21) == "b") ||
                (by_row[0].substr(21) == "b" && by_row[1].substr(21) == "a"));
  }
}

TEST(MergeOptionsValidate, NamesTheOption) {
  MergeOptions o;
  o.match_radius_arcsec = 0.0;
  try {
    validate(o);
    FAIL();
  } catch (const std::invalid_argument& e) {
    EXPECT_EQ(std::string(e.what()).substr(0, 37), "match_radius_arcsec = 0.000000 breaks");
  }
}

// The scatter's shortcut (one disc query per cell, pipeline/survey/merge.cpp) gives the
// same partitions as partitions_of for every component, and the home partition
// is the sort key's prefix (a NESTED pixel at order k is the order-29 index
// shifted right by 2 (29 - k) bits: Gorski et al. 2005, REF-HEALPIX-01) and is
// among them.
TEST(ScatterCell, SamePartitionsAsPartitionsOf) {
  std::mt19937_64 rng(11);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  for (int order : {0, 4, 9}) {
    MergeOptions o;
    o.partition_order = order;
    for (int i = 0; i < 3000; ++i) {
      const double ra = 360.0 * u(rng), dec = std::asin(2.0 * u(rng) - 1.0) * 180.0 / M_PI;
      const std::int64_t key = sky_sort_key(ra, dec);
      const auto want = partitions_of(ra, dec, o);
      EXPECT_EQ(partitions_of_cell(scatter_cell(key, o), o), want) << ra << " " << dec << " order " << order;
      const std::int64_t home = home_partition(key, o);
      EXPECT_EQ(home, key >> (2 * (29 - order)));
      EXPECT_TRUE(std::binary_search(want.begin(), want.end(), home)) << ra << " " << dec;
    }
  }
}
