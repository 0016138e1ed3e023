// Connected-component labelling checked against two references outside the
// module: a plain serial flood fill written here (the textbook definition of
// 8-connected components, common practice), and scipy.ndimage.label from
// Debian's python3-scipy (Virtanen et al. 2020, Nature Methods 17, 261) with a
// 3 x 3 structuring element (8-connectivity).
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <random>
#include <string>
#include <vector>

#include "skerry/islands.h"

using namespace skerry;

namespace {

// Serial flood fill in raster order: the first pixel met of each component
// starts a new label, so labels are numbered by the raster position of the
// component's first pixel. Components without a seed (level 2) or below
// min_pixels get 0; the numbering skips them.
LabelsI32 flood_fill_reference(const MaskU8& level, std::int64_t min_pixels) {
  const int h = static_cast<int>(level.rows()), w = static_cast<int>(level.cols());
  LabelsI32 tmp = LabelsI32::Zero(h, w);
  LabelsI32 out = LabelsI32::Zero(h, w);
  std::int32_t comp = 0, next = 0;
  std::vector<std::pair<int, int>> stack, members;
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) {
      if (level(y, x) == 0 || tmp(y, x) != 0) continue;
      ++comp;
      members.clear();
      stack.assign(1, {x, y});
      tmp(y, x) = comp;
      bool seed = false;
      while (!stack.empty()) {
        auto [cx, cy] = stack.back();
        stack.pop_back();
        members.push_back({cx, cy});
        seed = seed || level(cy, cx) >= 2;
        for (int dy = -1; dy <= 1; ++dy)
          for (int dx = -1; dx <= 1; ++dx) {
            const int nx = cx + dx, ny = cy + dy;
            if (nx < 0 || ny < 0 || nx >= w || ny >= h) continue;
            if (level(ny, nx) == 0 || tmp(ny, nx) != 0) continue;
            tmp(ny, nx) = comp;
            stack.push_back({nx, ny});
          }
      }
      if (!seed || static_cast<std::int64_t>(members.size()) < min_pixels) continue;
      ++next;
      for (auto [mx, my] : members) out(my, mx) = next;
    }
  return out;
}

MaskU8 random_mask(int w, int h, double density, unsigned seed, double seed_fraction = 1.0) {
  std::mt19937 rng(seed);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  MaskU8 m(h, w);
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) {
      const double v = u(rng);
      m(y, x) = v < density ? (v < density * seed_fraction ? 2 : 1) : 0;
    }
  return m;
}

// A square spiral of 1-pixel wide arms with 1-pixel gaps: one component that
// crosses every strip boundary many times; its arm ends meet only diagonally.
MaskU8 spiral_mask(int w, int h) {
  MaskU8 m = MaskU8::Zero(h, w);
  int x0 = 0, y0 = 0, x1 = w - 1, y1 = h - 1;
  while (x0 <= x1 && y0 <= y1) {
    for (int x = x0; x <= x1; ++x) m(y0, x) = 1;
    for (int y = y0; y <= y1; ++y) m(y, x1) = 1;
    if (y1 > y0 + 1) for (int x = x0; x <= x1; ++x) m(y1, x) = 1;
    if (x1 > x0 + 1) for (int y = y0 + 2; y <= y1; ++y) m(y, x0) = 1;
    x0 += 2;
    y0 += 2;
    x1 -= 2;
    y1 -= 2;
    // Step the spiral inwards: connect the left arm to the next turn diagonally.
    if (x0 <= x1 && y0 <= y1) m(y0 - 1, x0 - 1) = 0;
  }
  m(h / 2, w / 2) = 2;
  return m;
}

// Stripes: vertical (each crosses every strip), diagonal of 1-pixel width
// (joined only through corners, across every boundary) and anti-diagonal.
MaskU8 stripes_mask(int w, int h) {
  MaskU8 m = MaskU8::Zero(h, w);
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) {
      if (x % 9 == 4) m(y, x) = 1;
      if ((x + y) % 13 == 0) m(y, x) = 1;
      if ((x - y + 1000 * 11) % 11 == 0 && x > w / 2) m(y, x) = 1;
    }
  for (int y = 0; y < h; y += 17)
    for (int x = 0; x < w; x += 5)
      if (m(y, x)) m(y, x) = 2;
  return m;
}

void expect_same_for_all_threads_and_strips(const MaskU8& mask, std::int64_t min_pixels, const std::string& what) {
  const LabelsI32 want = flood_fill_reference(mask, min_pixels);
  for (int threads : {1, 2, 3, 8})
    for (int strip : {1, 2, 7, 64}) {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
      const LabelsI32 got = label_levels(mask, min_pixels, strip);
      ASSERT_TRUE((got == want).all()) << what << ": threads " << threads << ", strip rows " << strip;
    }
}

std::string python() {
  // Debian's interpreter, which has python3-scipy (an interpreter earlier on
  // PATH may not).
  return std::filesystem::exists("/usr/bin/python3") ? "/usr/bin/python3" : "python3";
}

}  // namespace

TEST(Labelling, RandomMasksNearPercolationMatchFloodFill) {
  // Density 0.41: near the site-percolation threshold of the 8-connected square
  // lattice (1 - 0.5927 = 0.4073, the complement of the 4-connected threshold;
  // Stauffer & Aharony 1994, Introduction to Percolation Theory), where clusters
  // are large and tangled. Odd sizes so that strips and rows do not divide evenly.
  int trial = 0;
  for (auto [w, h] : {std::pair{257, 131}, std::pair{101, 333}, std::pair{1, 77}, std::pair{83, 1}}) {
    const MaskU8 m = random_mask(w, h, 0.41, 100 + trial);
    expect_same_for_all_threads_and_strips(m, 1, "random " + std::to_string(w) + "x" + std::to_string(h));
    ++trial;
  }
  // Hysteresis: few seeds (2 % of foreground) and a minimum size.
  const MaskU8 sparse = random_mask(199, 181, 0.41, 7, 0.02);
  expect_same_for_all_threads_and_strips(sparse, 1, "sparse seeds");
  expect_same_for_all_threads_and_strips(sparse, 25, "min size 25");
}

TEST(Labelling, SpiralsAndStripesAcrossEveryStripBoundary) {
  expect_same_for_all_threads_and_strips(spiral_mask(61, 47), 1, "spiral 61x47");
  expect_same_for_all_threads_and_strips(spiral_mask(128, 129), 1, "spiral 128x129");
  expect_same_for_all_threads_and_strips(stripes_mask(97, 203), 1, "stripes 97x203");
  // The spiral is one component.
  const LabelsI32 l = label_levels(spiral_mask(61, 47), 1, 3);
  EXPECT_EQ(l.maxCoeff(), 1);
}

TEST(Labelling, EightConnectivityAndCanonicalOrder) {
  // Two diagonal pixels are one island; the island whose first pixel comes
  // first in raster order is 1, even if its seed is further down.
  // Indices are (y, x). Island A: (x, y) = (4, 0), (5, 1) [diagonal], (5, 2),
  // (5, 3), (5, 4) with its seed last; island B: the seed (0, 1).
  MaskU8 m = MaskU8::Zero(5, 6);
  m(0, 4) = 1;
  m(1, 5) = 1;
  m(2, 5) = 1;
  m(3, 5) = 1;
  m(4, 5) = 2;
  m(1, 0) = 2;
  const LabelsI32 l = label_levels(m, 1, 2);
  EXPECT_EQ(l(0, 4), 1);  // first pixel at row 0
  EXPECT_EQ(l(4, 5), 1);
  EXPECT_EQ(l(1, 0), 2);
  EXPECT_EQ(l.maxCoeff(), 2);
  // Without a seed a component is not an island.
  MaskU8 n = MaskU8::Zero(3, 3);
  n(1, 1) = 1;
  EXPECT_EQ(label_levels(n).maxCoeff(), 0);
  EXPECT_EQ(label_levels(MaskU8::Zero(0, 0)).size(), 0);
}

TEST(Labelling, AgreesWithScipyNdimageLabel) {
  const int w = 313, h = 217;
  const MaskU8 m = random_mask(w, h, 0.41, 2027);
  const auto dir = std::filesystem::temp_directory_path() /
                   ("skerry_label_test_" + std::to_string(::testing::UnitTest::GetInstance()->random_seed()) +
                    "_" + std::to_string(reinterpret_cast<std::uintptr_t>(&m) & 0xffffff));
  std::filesystem::create_directories(dir);
  const auto in = dir / "mask.u8", out = dir / "labels.i32";
  {
    std::ofstream f(in, std::ios::binary);
    for (int y = 0; y < h; ++y)
      for (int x = 0; x < w; ++x) {
        const char c = m(y, x) ? 1 : 0;
        f.write(&c, 1);
      }
  }
  const std::string script =
      "import sys, numpy as np, scipy.ndimage as nd; "
      "h, w = int(sys.argv[1]), int(sys.argv[2]); "
      "m = np.fromfile(sys.argv[3], dtype=np.uint8).reshape(h, w); "
      "lab, n = nd.label(m > 0, structure=np.ones((3, 3), dtype=int)); "
      "lab.astype('<i4').tofile(sys.argv[4])";
  const std::string cmd = python() + " -c \"" + script + "\" " + std::to_string(h) + " " + std::to_string(w) + " " +
                          in.string() + " " + out.string();
  ASSERT_EQ(std::system(cmd.c_str()), 0) << "needs python3-scipy (scripts/deps.sh): " << cmd;
  std::vector<std::int32_t> ref(static_cast<std::size_t>(w) * h);
  {
    std::ifstream f(out, std::ios::binary);
    f.read(reinterpret_cast<char*>(ref.data()), static_cast<std::streamsize>(ref.size() * 4));
    ASSERT_TRUE(f.good());
  }
  std::filesystem::remove_all(dir);
  // Every foreground pixel is a seed here (level 1 everywhere -> use level 2).
  MaskU8 seeds = m;
  for (Eigen::Index i = 0; i < seeds.size(); ++i) seeds.data()[i] = m.data()[i] ? 2 : 0;
  const LabelsI32 got = label_levels(seeds, 1, 5);
  // Same partition: a bijection between scipy's labels and ours.
  std::map<std::int32_t, std::int32_t> fwd, back;
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) {
      const std::int32_t a = ref[static_cast<std::size_t>(y) * w + x], b = got(y, x);
      ASSERT_EQ(a == 0, b == 0) << x << "," << y;
      if (a == 0) continue;
      auto [i1, new1] = fwd.emplace(a, b);
      auto [i2, new2] = back.emplace(b, a);
      ASSERT_EQ(i1->second, b) << "scipy label " << a << " maps to two of ours at " << x << "," << y;
      ASSERT_EQ(i2->second, a) << "our label " << b << " maps to two of scipy's at " << x << "," << y;
    }
  EXPECT_EQ(fwd.size(), static_cast<std::size_t>(got.maxCoeff()));
  EXPECT_GT(fwd.size(), 100u);
}
