// A known source-count law recovered through the whole pipeline: `skerry simulate`
// draws point sources from dN/dS proportional to S^-2.5 (the Euclidean slope),
// `skerry extract` measures them, and the Euclidean-normalised counts of the
// catalogue (modules/quality, as the report plots them) agree bin by bin with the
// law above 10 sigma.
//
// For an unresolved source the integrated flux density equals the peak (definition
// of Jy/beam, common practice) and the fitted peak is the better-measured of the
// two (Condon 1997, PASP 109, 166: sigma_S_int = sqrt(3) sigma_peak for a point
// source, REF-CONDON-02). Every source drawn here is a point, so the peaks recover
// the law. Expected count in [lo, hi):
//   N_bin = N (lo^(1-g) - hi^(1-g)) / (S_min^(1-g) - S_max^(1-g)),  g = 2.5
// (the integral of the drawn power law). Tolerance: 3 Poisson sigma plus 5 % for
// the Eddington bias that remains at 10 sigma with steep counts (REF-COMPL-02).
//
// The report counts by count_flux_jy: the peak for components the ratio test calls
// unresolved, S_int for the others. Near the threshold that test calls some point
// sources resolved (those whose S_int scattered up, and blends), so the report's
// counts lie above the law in the faintest bin; the second test pins that they are
// still closer to it, bin by bin, than counts by S_int.
#include <gtest/gtest.h>

#include <sys/wait.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>

#include "io/table_io.h"
#include "skerry/quality.h"
#include "skerry_test_support.h"

namespace fs = std::filesystem;

namespace skerry {
namespace {

int sh(const std::string& c) { return test::shell_quiet(c); }

constexpr double kDrawn = 8000, kSlope = 2.5, kSMin = 5e-5, kSMax = 0.05, kRms = 2e-5;

class CountLaw : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    dir_ = fs::temp_directory_path() / ("skerry_count_law_test_" + std::to_string(::getpid()));
    fs::remove_all(dir_);
    fs::create_directories(dir_);
    const std::string sk = SKERRY_BINARY;
    ASSERT_EQ(sh(sk + " simulate --out " + dir_.string() +
                 " --bands.freq_mhz 1400 --sources.count 8000 --sources.slope 2.5"
                 " --sources.s_min_jy 5e-5 --sources.s_max_jy 0.05 --sources.resolved_fraction 0"
                 " --sources.double_fraction 0 --primary_beam.fwhm_deg 0 --background.amplitude_jy_per_beam 0"
                 " --noise.rms_jy_per_beam 2e-5 --field.size_pix 2048 --output.primary_beam_images false"
                 " --output.name law"),
              0);
    ASSERT_EQ(sh(sk + " extract " + (dir_ / "law_1400MHz.fits").string() + " --out " + (dir_ / "run").string() +
                 " --output.formats csv --output.maps false --output.model false --output.residual false"),
              0);
    table_ = read_table((dir_ / "run/law_1400MHz.components.csv").string());
  }
  static void TearDownTestSuite() { fs::remove_all(dir_); }

  // Bins of half a decade from 10 sigma; the area is any constant (counts per bin are compared).
  static std::vector<CountsBin> count(const std::vector<double>& flux_jy) {
    CountsOptions o;
    for (int i = 0; i <= 6; ++i) o.edges_jy.push_back(10 * kRms * std::pow(10.0, i / 2.0));
    return euclidean_counts(flux_jy, o, [](double) { return kAreaSr; });
  }
  static double expected(const CountsBin& b) {
    const double norm = kDrawn / (std::pow(kSMin, 1 - kSlope) - std::pow(kSMax, 1 - kSlope));
    return norm * (std::pow(b.lo_jy, 1 - kSlope) - std::pow(b.hi_jy, 1 - kSlope));
  }
  static double tolerance(double expect) { return 3 * std::sqrt(expect) + 0.05 * expect; }

  static constexpr double kAreaSr = 1e-3;
  static fs::path dir_;
  static Table table_;
};
fs::path CountLaw::dir_;
Table CountLaw::table_;

TEST_F(CountLaw, PeaksOfPointSourcesRecoverTheLawAboveTenSigma) {
  const std::vector<double>& peak = table_.at("s_peak_jy_per_beam").f64;
  ASSERT_GT(peak.size(), 500u);
  const auto bins = count(peak);
  ASSERT_EQ(bins.size(), 6u);
  int checked = 0;
  for (const auto& b : bins) {
    // The Euclidean normalisation of the bin, as the report plots it.
    EXPECT_NEAR(b.euclid, std::pow(b.centre_jy, 2.5) * b.n / (kAreaSr * (b.hi_jy - b.lo_jy)), 1e-9 * (1 + b.euclid));
    const double expect = expected(b);
    if (expect < 5) continue;
    ++checked;
    EXPECT_NEAR(static_cast<double>(b.n), expect, tolerance(expect)) << "bin [" << b.lo_jy << ", " << b.hi_jy << ") Jy";
  }
  EXPECT_GE(checked, 3);
}

TEST_F(CountLaw, ReportRuleIsCloserToTheLawThanIntegratedFluxDensities) {
  std::vector<double> resolved;
  for (auto r : table_.at("resolved").i64) resolved.push_back(static_cast<double>(r));
  const auto by_rule = count(count_flux_jy(table_.at("s_peak_jy_per_beam").f64, table_.at("s_int_jy").f64, resolved));
  const auto by_int = count(table_.at("s_int_jy").f64);
  ASSERT_EQ(by_rule.size(), by_int.size());
  for (std::size_t i = 0; i < by_rule.size(); ++i) {
    const double expect = expected(by_rule[i]);
    const double off_rule = std::abs(static_cast<double>(by_rule[i].n) - expect);
    const double off_int = std::abs(static_cast<double>(by_int[i].n) - expect);
    std::printf("bin [%.3g, %.3g) Jy: expected %.1f, report rule %zu, S_int %zu\n", by_rule[i].lo_jy, by_rule[i].hi_jy,
                expect, by_rule[i].n, by_int[i].n);
    EXPECT_LE(off_rule, off_int) << "bin " << i;
  }
  // In the faintest bin counting by S_int is off by more than the tolerance (the Eddington
  // bias of the sqrt(3) wider scatter), and the report's rule takes back a real part of it.
  const double expect0 = expected(by_int[0]);
  EXPECT_GT(static_cast<double>(by_int[0].n) - expect0, tolerance(expect0));
  EXPECT_LT(static_cast<double>(by_rule[0].n) - expect0, 0.75 * (static_cast<double>(by_int[0].n) - expect0));
}

}  // namespace
}  // namespace skerry
