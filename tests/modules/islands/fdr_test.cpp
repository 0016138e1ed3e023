// False-discovery-rate thresholds: Benjamini & Hochberg (1995, J. R. Stat.
// Soc. B 57, 289), Benjamini & Yekutieli (2001, Ann. Stat. 29, 1165), per pixel
// as in Hopkins et al. (2002, AJ 123, 1086). Worked examples REF-FDR-02.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <vector>

#include "correlated_noise.h"
#include "skerry/islands.h"

using namespace skerry;
using skerry::testing::add_gaussian;
using skerry::testing::correlated_noise;

// REF-FDR-02 example 1 (its answer also in an R package's documentation):
// BH rejects {0.01, 0.001, 0.02, 0.0025}, k = 4, p(k) = 0.02; BY with
// c_7 = 2.5928571428571425 rejects only {0.001, 0.0025}.
TEST(Fdr, WorkedExampleOne) {
  const std::vector<double> p = {0.50, 0.01, 0.001, 0.69, 0.02, 0.05, 0.0025};
  const FdrResult bh = fdr_from_pvalues(p, 0.05, false);
  EXPECT_EQ(bh.tests, 7);
  EXPECT_EQ(bh.rejections, 4);
  EXPECT_EQ(bh.p_threshold, 0.02);
  const std::vector<bool> want_bh = {false, true, true, false, true, false, true};
  for (std::size_t i = 0; i < p.size(); ++i) EXPECT_EQ(p[i] <= bh.p_threshold, want_bh[i]) << i;
  const FdrResult by = fdr_from_pvalues(p, 0.05, true);
  EXPECT_NEAR(by.c_n, 2.5928571428571425, 1e-15);
  EXPECT_EQ(by.rejections, 2);
  const std::vector<bool> want_by = {false, false, true, false, false, false, true};
  for (std::size_t i = 0; i < p.size(); ++i) EXPECT_EQ(p[i] <= by.p_threshold, want_by[i]) << i;
}

// REF-FDR-02 example 2 (the illustration in Benjamini & Hochberg 1995): BH
// rejects 4 (p(k) = 0.0095); Bonferroni (p <= 0.05 / 15) would reject 3.
TEST(Fdr, WorkedExampleTwo) {
  const std::vector<double> p = {0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344,
                                 0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000};
  const FdrResult bh = fdr_from_pvalues(p, 0.05, false);
  EXPECT_EQ(bh.rejections, 4);
  EXPECT_EQ(bh.p_threshold, 0.0095);
  int bonferroni = 0;
  for (double v : p) bonferroni += v <= 0.05 / 15 ? 1 : 0;
  EXPECT_EQ(bonferroni, 3);
}

// REF-FDR-02 example 3, on an image (1 x 10 pixels, background 0, rms 1):
// one-sided p = erfc(z / sqrt 2) / 2 (REF-ROBUST-04); BH keeps the first six
// (threshold at z = 2.0, p = 0.02275013195); BY (c_10 = 2.9289682539682538)
// keeps the first five (threshold at z = 2.9).
TEST(Fdr, WorkedExampleThreeOnPixels) {
  const std::vector<float> z = {6.0f, 4.5f, 3.9f, 3.2f, 2.9f, 2.0f, 1.0f, 0.5f, -0.3f, -1.2f};
  ImageF img(1, 10);
  for (int i = 0; i < 10; ++i) img(0, i) = z[i];
  const NoiseMaps maps = NoiseMaps::constant(10, 1, 0.0f, 1.0f);
  FdrResult bh;
  const double t_bh = fdr_threshold(img, maps, 0.05, false, &bh);
  EXPECT_EQ(bh.tests, 10);
  EXPECT_EQ(bh.rejections, 6);
  EXPECT_EQ(t_bh, 2.0);
  EXPECT_NEAR(bh.p_threshold, 0.02275013195, 1e-11);
  FdrResult by;
  const double t_by = fdr_threshold(img, maps, 0.05, true, &by);
  EXPECT_NEAR(by.c_n, 2.9289682539682538, 1e-15);
  EXPECT_EQ(by.rejections, 5);
  EXPECT_EQ(t_by, static_cast<double>(2.9f));
  // In find_islands the FDR threshold seeds islands; every rejected pixel is
  // >= the grow threshold 3 or the grow threshold is lowered to the seed one.
  IslandOptions o;
  o.peak_threshold = PeakThreshold::fdr;
  const IslandResult r = find_islands(img, maps, o);
  EXPECT_EQ(r.peak_snr_used, 2.0);
  EXPECT_EQ(r.grow_snr_used, 2.0);
  EXPECT_EQ(r.fdr_rejections, 6);
  ASSERT_EQ(r.islands.size(), 1u);
  EXPECT_EQ(r.islands[0].pixels, 6);
}

// c_N = sum 1/j; the large-N expansion joins the direct sum smoothly.
TEST(Fdr, ByConstant) {
  EXPECT_EQ(by_constant(1), 1.0);
  EXPECT_NEAR(by_constant(7), 2.5928571428571425, 1e-15);   // REF-FDR-02
  EXPECT_NEAR(by_constant(10), 2.9289682539682538, 1e-15);  // REF-FDR-02
  // Euler-Maclaurin (Abramowitz & Stegun 6.3.18) at N = 10^7 + 1 vs the sum.
  EXPECT_NEAR(by_constant(10'000'001), by_constant(10'000'000) + 1.0 / 10'000'001.0, 1e-13);
}

// Pure noise: with all nulls true, the FDR equals the family-wise error rate
// (every rejection is false), so BH controls P(any detection) <= alpha for
// independent or positively dependent tests (Benjamini & Hochberg 1995,
// Theorem 1; Benjamini & Yekutieli 2001, Theorem 1.2, PRDS, which holds for
// one-sided tests on positively correlated Gaussian noise). Beam-correlated
// noise, 48 x 48 pixels, 300 realisations, alpha = 0.1: the count of
// realisations with any detection is Binomial(300, q) with q <= 0.1; allow its
// mean + 3 standard deviations at q = 0.1, 30 + 3 sqrt(27) = 45.6.
TEST(Fdr, PureNoiseAnyDetectionRateWithinAlpha) {
  const int n_real = 300;
  const double alpha = 0.1;
  int any_bh = 0, any_by = 0;
  for (int k = 0; k < n_real; ++k) {
    const ImageF img = correlated_noise(48, 48, 3.0, 1.0, 1000 + k);
    const NoiseMaps maps = NoiseMaps::constant(48, 48, 0.0f, 1.0f);
    FdrResult bh, by;
    fdr_threshold(img, maps, alpha, false, &bh);
    fdr_threshold(img, maps, alpha, true, &by);
    any_bh += bh.rejections > 0 ? 1 : 0;
    any_by += by.rejections > 0 ? 1 : 0;
    EXPECT_LE(by.rejections, bh.rejections);  // c_N >= 1: BY never rejects more
  }
  const double limit = n_real * alpha + 3.0 * std::sqrt(n_real * alpha * (1 - alpha));
  std::printf("[ info ] realisations with any detection: BH %d, BY %d of %d (limit %.1f)\n", any_bh, any_by,
              n_real, limit);
  EXPECT_LE(any_bh, limit);
  EXPECT_LE(any_by, limit);
}

// With a real source present the FDR threshold is finite and finds it.
TEST(Fdr, FindsInjectedSource) {
  ImageF img = correlated_noise(64, 64, 3.0, 1.0, 77);
  add_gaussian(img, 30.0, 33.0, 3.0, 12.0);
  const NoiseMaps maps = NoiseMaps::constant(64, 64, 0.0f, 1.0f);
  IslandOptions o;
  o.peak_threshold = PeakThreshold::fdr;
  o.fdr_alpha = 0.05;
  const IslandResult r = find_islands(img, maps, o);
  EXPECT_TRUE(std::isfinite(r.peak_snr_used));
  EXPECT_GT(r.fdr_rejections, 0);
  ASSERT_GE(r.islands.size(), 1u);
  EXPECT_GT(r.labels(33, 30), 0);
  // Nothing at all: no rejection, threshold +inf, no islands.
  const ImageF flat = ImageF::Constant(16, 16, -1.0f);
  const IslandResult e = find_islands(flat, NoiseMaps::constant(16, 16, 0.0f, 1.0f), o);
  EXPECT_TRUE(std::isinf(e.peak_snr_used));
  EXPECT_TRUE(e.islands.empty());
}
