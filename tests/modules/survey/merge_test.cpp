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

// Every true source inside the survey appears exactly once; the kept copy comes
// from the tile whose cell holds it; a blended pair in one tile is not merged.
TEST(MergeComponents, EachSourceOnceFromItsCell) {
  auto s = make_survey(11, 3000);
  MergeOptions o;
  o.match_radius_arcsec = 5.0;
  auto r = merge_components(s.comps, s.centres, o);
  EXPECT_EQ(r.input_rows, s.comps.size());
  std::map<std::pair<std::int32_t, std::int64_t>, std::size_t> index;
  for (std::size_t i = 0; i < s.comps.size(); ++i) index[{s.comps[i].tile, s.comps[i].row}] = i;
  std::vector<int> times(s.truth.size(), 0);
  for (const auto& k : r.kept) {
    const std::size_t i = index.at({k.tile, k.row});
    ++times[s.truth_of[i]];
    EXPECT_EQ(nearest_tile(s.centres, {k.ra_deg, k.dec_deg}), static_cast<std::size_t>(k.tile));
  }
  std::vector<int> seen(s.truth.size(), 0);
  for (auto t : s.truth_of) seen[t] = 1;
  std::size_t once = 0, duplicated = 0, lost = 0;
  for (std::size_t k = 0; k < s.truth.size(); ++k) {
    if (!seen[k]) continue;
    if (times[k] == 1) ++once;
    if (times[k] > 1) ++duplicated;
    if (times[k] == 0) ++lost;
  }
  // Jitter 0.3 arcsec: a source within ~1 arcsec of a cell boundary can land on
  // either side in two tiles' measurements, giving 0 or 2 copies. The fraction
  // of sources that close to a boundary is tiny (boundary length x 2 arcsec over
  // the area, < 0.2 % here); both must show up in the check counts.
  EXPECT_GT(once, static_cast<std::size_t>(0.99 * static_cast<double>(once + duplicated + lost)));
  EXPECT_EQ(r.residual_duplicate_pairs, duplicated);
  EXPECT_EQ(r.dropped_by_cell + r.kept.size(), s.comps.size());
  EXPECT_EQ(r.kept.size(), r.names.size());
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
         a.dropped_by_cell == b.dropped_by_cell;
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
