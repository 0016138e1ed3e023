// Hysteresis islands and their statistics, against brute-force definitions.
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <cmath>
#include <limits>
#include <stdexcept>
#include <vector>

#include "correlated_noise.h"
#include "skerry/background.h"
#include "skerry/islands.h"

using namespace skerry;
using skerry::testing::add_gaussian;
using skerry::testing::correlated_noise;

namespace {
constexpr float kNaN = std::numeric_limits<float>::quiet_NaN();

// Brute force from the definitions in islands.h: snr = (I - B) / rms computed
// as the module states (float), foreground snr >= grow, seed snr >= peak; then
// a flood fill (labelling_test.cpp checks label_levels against it).
MaskU8 levels_by_definition(const ImageF& img, const NoiseMaps& maps, double peak, double grow) {
  MaskU8 lev = MaskU8::Zero(img.rows(), img.cols());
  for (int y = 0; y < img.rows(); ++y)
    for (int x = 0; x < img.cols(); ++x) {
      const float rms = maps.rms_at(x, y);
      if (!(rms > 0.0f) || !std::isfinite(rms)) continue;
      const float s = (img(y, x) - maps.background_at(x, y)) / rms;
      if (!(static_cast<double>(s) >= grow)) continue;
      lev(y, x) = static_cast<double>(s) >= peak ? 2 : 1;
    }
  return lev;
}

void expect_same(const IslandResult& a, const IslandResult& b, const std::string& what) {
  ASSERT_TRUE((a.labels == b.labels).all()) << what;
  ASSERT_EQ(a.islands.size(), b.islands.size()) << what;
  for (std::size_t i = 0; i < a.islands.size(); ++i) {
    const Island &p = a.islands[i], &q = b.islands[i];
    EXPECT_EQ(p.pixels, q.pixels) << what;
    EXPECT_EQ(p.peak_snr, q.peak_snr) << what;
    EXPECT_EQ(p.peak_x, q.peak_x) << what;
    EXPECT_EQ(p.peak_y, q.peak_y) << what;
    EXPECT_EQ(p.sum_minus_background, q.sum_minus_background) << what;  // bitwise
    EXPECT_EQ(p.x_min, q.x_min);
    EXPECT_EQ(p.y_max, q.y_max);
  }
}
}  // namespace

// Per-island statistics against sums written out over the label map.
TEST(Islands, StatisticsMatchBruteForce) {
  ImageF img = correlated_noise(211, 157, 3.0, 1.0, 17);
  add_gaussian(img, 50.3, 40.7, 5.0, 30.0);
  add_gaussian(img, 150.0, 100.0, 12.0, 8.0);
  add_gaussian(img, 0.0, 80.0, 4.0, 20.0);     // on the left edge
  add_gaussian(img, 103.0, 150.0, 3.0, 15.0);  // next to a blank patch
  for (int y = 148; y < 157; ++y)
    for (int x = 105; x < 110; ++x) img(y, x) = kNaN;
  const NoiseMaps maps = NoiseMaps::constant(211, 157, 0.05f, 1.0f);
  IslandOptions o;
  const IslandResult r = find_islands(img, maps, o);
  ASSERT_GE(r.islands.size(), 4u);
  EXPECT_EQ(r.peak_snr_used, 5.0);
  EXPECT_EQ(r.grow_snr_used, 3.0);
  // Labels: exactly the brute-force hysteresis components.
  const LabelsI32 want = label_levels(levels_by_definition(img, maps, 5.0, 3.0));
  ASSERT_TRUE((r.labels == want).all());
  bool saw_edge = false, saw_blank = false;
  for (const Island& isl : r.islands) {
    std::int64_t n = 0;
    double sum = 0.0, peak = -1e30;
    int px = -1, py = -1, x0 = 1 << 30, x1 = -1, y0 = 1 << 30, y1 = -1, fx = -1, fy = -1;
    bool edge = false, blank = false;
    for (int y = 0; y < img.rows(); ++y)
      for (int x = 0; x < img.cols(); ++x) {
        if (r.labels(y, x) != isl.label) continue;
        if (fx < 0) fx = x, fy = y;
        ++n;
        const float d = img(y, x) - 0.05f;
        sum += d;
        if (d / 1.0f > peak) peak = d / 1.0f, px = x, py = y;
        x0 = std::min(x0, x), x1 = std::max(x1, x), y0 = std::min(y0, y), y1 = std::max(y1, y);
        edge = edge || x == 0 || y == 0 || x == img.cols() - 1 || y == img.rows() - 1;
        for (int dy = -1; dy <= 1; ++dy)
          for (int dx = -1; dx <= 1; ++dx) {
            const int xx = x + dx, yy = y + dy;
            if (xx >= 0 && yy >= 0 && xx < img.cols() && yy < img.rows() && std::isnan(img(yy, xx))) blank = true;
          }
      }
    EXPECT_EQ(isl.pixels, n);
    // Row sums are added run by run in the module: same values, another order.
    EXPECT_NEAR(isl.sum_minus_background, sum, 1e-9 * std::fabs(sum) + 1e-9);
    EXPECT_EQ(isl.peak_snr, peak);
    EXPECT_EQ(isl.peak_x, px);
    EXPECT_EQ(isl.peak_y, py);
    EXPECT_EQ(isl.peak_value, img(py, px));
    EXPECT_EQ(isl.peak_background, 0.05f);
    EXPECT_EQ(isl.peak_rms, 1.0f);
    EXPECT_EQ(isl.x_min, x0);
    EXPECT_EQ(isl.x_max, x1);
    EXPECT_EQ(isl.y_min, y0);
    EXPECT_EQ(isl.y_max, y1);
    EXPECT_EQ(isl.first_x, fx);
    EXPECT_EQ(isl.first_y, fy);
    EXPECT_EQ(isl.touches_edge, edge);
    EXPECT_EQ(isl.touches_blank, blank);
    saw_edge = saw_edge || edge;
    saw_blank = saw_blank || blank;
  }
  EXPECT_TRUE(saw_edge);
  EXPECT_TRUE(saw_blank);
  // Islands are numbered by the raster position of their first pixel.
  for (std::size_t i = 1; i < r.islands.size(); ++i) {
    const Island &a = r.islands[i - 1], &b = r.islands[i];
    EXPECT_TRUE(a.first_y < b.first_y || (a.first_y == b.first_y && a.first_x < b.first_x));
    EXPECT_EQ(b.label, static_cast<std::int32_t>(i + 1));
  }
}

// Same labels and statistics for any thread count and strip size, on maps from
// the background module (grid, interpolated row by row).
TEST(Islands, IndependentOfThreadsAndStrips) {
  ImageF img = correlated_noise(301, 257, 3.0, 1.0, 5);
  for (int i = 0; i < 40; ++i) add_gaussian(img, std::fmod(37.3 * i, 301.0), std::fmod(53.1 * i, 257.0), 3.0 + i % 5, 4.0 + i);
  BackgroundOptions bo;
  bo.beam_fwhm_pix = 3.0;
  bo.box_pixels = 60;
  const BackgroundResult bg = estimate_background(img, bo);
  ASSERT_EQ(bg.status, BackgroundStatus::ok);
  IslandOptions o;
  o.strip_rows = 64;
  IslandResult ref;
  {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 1);
    ref = find_islands(img, bg.maps, o);
  }
  ASSERT_GT(ref.islands.size(), 20u);
  for (int threads : {2, 3, 8})
    for (int strip : {1, 7, 64}) {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
      o.strip_rows = strip;
      expect_same(find_islands(img, bg.maps, o), ref,
                  "threads " + std::to_string(threads) + " strip " + std::to_string(strip));
    }
}

// Thresholds are inclusive: snr >= peak seeds, snr >= grow grows; min_pixels drops.
TEST(Islands, ThresholdsAndMinimumSize) {
  ImageF img = ImageF::Zero(7, 9);
  img(1, 1) = 5.0f;  // exactly at peak: an island of 1 pixel
  img(4, 4) = 4.999f;
  img(4, 5) = 3.0f;  // grow only: no island
  img(5, 7) = 6.0f;
  img(5, 8) = 3.0f;
  img(6, 8) = 2.999f;  // below grow
  const NoiseMaps maps = NoiseMaps::constant(9, 7, 0.0f, 1.0f);
  IslandOptions o;
  IslandResult r = find_islands(img, maps, o);
  ASSERT_EQ(r.islands.size(), 2u);
  EXPECT_EQ(r.islands[0].pixels, 1);
  EXPECT_EQ(r.islands[1].pixels, 2);
  EXPECT_TRUE(r.islands[1].touches_edge);
  EXPECT_FALSE(r.islands[0].touches_edge);
  o.min_pixels = 2;
  r = find_islands(img, maps, o);
  ASSERT_EQ(r.islands.size(), 1u);
  EXPECT_EQ(r.islands[0].label, 1);
  EXPECT_EQ(r.labels(5, 7), 1);
  EXPECT_EQ(r.labels(1, 1), 0);
  EXPECT_EQ(r.islands_too_small, 1);
}

// All-NaN image, constant image, zero rms: defined, empty results.
TEST(Islands, EdgeCasesGiveNoIslands) {
  const ImageF nan = ImageF::Constant(20, 30, kNaN);
  IslandResult r = find_islands(nan, NoiseMaps::constant(30, 20, 0.0f, 1.0f), {});
  EXPECT_TRUE(r.islands.empty());
  EXPECT_EQ(r.labels.rows(), 20);
  EXPECT_EQ(r.labels.cols(), 30);
  EXPECT_EQ(r.labels.maxCoeff(), 0);
  const ImageF flat = ImageF::Constant(20, 30, 3.0f);
  r = find_islands(flat, NoiseMaps::constant(30, 20, 3.0f, 1.0f), {});
  EXPECT_TRUE(r.islands.empty());
  // rms = 0 makes every pixel blank (never foreground), however bright.
  r = find_islands(flat, NoiseMaps::constant(30, 20, 0.0f, 0.0f), {});
  EXPECT_TRUE(r.islands.empty());
  // An image without pixels: empty labels, no islands.
  const ImageF none(0, 5);
  r = find_islands(none, NoiseMaps::constant(5, 0, 0.0f, 1.0f), {});
  EXPECT_TRUE(r.islands.empty());
  EXPECT_EQ(r.labels.size(), 0);
  IslandOptions fdr;
  fdr.peak_threshold = PeakThreshold::fdr;
  EXPECT_TRUE(find_islands(none, NoiseMaps::constant(5, 0, 0.0f, 1.0f), fdr).islands.empty());
  // Wrong map size and bad options are refused.
  EXPECT_THROW(find_islands(flat, NoiseMaps::constant(29, 20, 0.0f, 1.0f), {}), std::invalid_argument);
  EXPECT_THROW(find_islands(flat, NoiseMaps{}, {}), std::invalid_argument);
  IslandOptions bad;
  bad.grow_snr = 6.0;
  EXPECT_EQ(bad.validate(), "grow_snr = 6 breaks grow_snr <= peak_snr (5)");
  EXPECT_THROW(find_islands(flat, NoiseMaps::constant(30, 20, 0.0f, 1.0f), bad), std::invalid_argument);
  // Thresholds at or below zero (every pixel above the mean would grow islands).
  IslandOptions neg;
  neg.peak_snr = -3.0;
  neg.grow_snr = -4.0;
  EXPECT_EQ(neg.validate(), "peak_snr = -3 breaks 0 < peak_snr < infinity");
  neg.peak_snr = 5.0;
  EXPECT_EQ(neg.validate(), "grow_snr = -4 breaks 0 < grow_snr < infinity");
  neg.grow_snr = 0.0;
  EXPECT_EQ(neg.validate(), "grow_snr = 0 breaks 0 < grow_snr < infinity");
  neg.peak_threshold = PeakThreshold::fdr;  // the FDR threshold still needs a positive growth threshold
  EXPECT_EQ(neg.validate(), "grow_snr = 0 breaks 0 < grow_snr < infinity");
}
