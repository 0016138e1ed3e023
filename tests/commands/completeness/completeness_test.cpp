// skerry completeness on pure correlated noise (a simulated field without sources):
// injected point sources are found half of the time at the peak threshold
// (REF-COMPL-01: P_det = Phi((S - T)/sigma), 0.5 at S = T; common practice) and
// essentially always at twice it; the tables do not depend on the thread count.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>

#include "io/table_io.h"
#include "skerry_test_support.h"

namespace fs = std::filesystem;

namespace skerry {
namespace {

int sh(const std::string& c) { return test::shell_quiet(c); }
using test::slurp;

class PureNoise : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    dir_ = fs::temp_directory_path() / ("skerry_completeness_test_" + std::to_string(::getpid()));
    fs::remove_all(dir_);
    fs::create_directories(dir_);
    const std::string sk = SKERRY_BINARY;
    // Correlated noise only (beam 6" x 5" on 1.5" pixels), no sources, no primary beam, no background.
    ASSERT_EQ(sh(sk + " simulate --out " + dir_.string() + " --bands.freq_mhz 1400 --noise.rms_jy_per_beam 2e-5"
                 " --field.size_pix 768 --primary_beam.fwhm_deg 0 --background.amplitude_jy_per_beam 0"
                 " --bands.crpix_shift_pix 0 --sources.count 0 --output.name noise"), 0);
    image_ = (dir_ / "noise_1400MHz.fits").string();
  }
  static void TearDownTestSuite() { fs::remove_all(dir_); }
  static fs::path dir_;
  static std::string image_;
};
fs::path PureNoise::dir_;
std::string PureNoise::image_;

TEST_F(PureNoise, HalfAtThresholdAllAtTwiceIt) {
  // 8 rounds x 250 = 2000 injections on 8 levels from 3.5 to 10 sigma: 250 per level.
  // Near the threshold Phi rises by 0.4 per sigma and a level's binomial error is
  // <= 0.5/sqrt(250) = 0.032, i.e. 0.08 sigma on the 50 % point: the 0.2 sigma
  // tolerance is 2.5 of these errors.
  const fs::path out = dir_ / "c1";
  ASSERT_EQ(sh(std::string(SKERRY_BINARY) + " completeness " + image_ + " --out " + out.string() +
               " --seed 11 --completeness.rounds 8 --completeness.per_round 250 --completeness.snr_min 3.5"
               " --completeness.snr_max 10 --completeness.levels 8 --completeness.reliability false"), 0);
  const Table t = read_table((out / "noise_1400MHz.completeness.csv").string());
  const auto& var = t.at("binned_by").text;
  const auto& lo = t.at("lo").f64;
  const auto& hi = t.at("hi").f64;
  const auto& f = t.at("completeness").f64;
  const auto& n = t.at("n_injected").i64;
  std::vector<double> x, y;
  for (std::size_t i = 0; i < t.rows(); ++i)
    if (var[i] == "snr" && n[i] >= 100) { x.push_back(std::sqrt(lo[i] * hi[i])); y.push_back(f[i]); }
  ASSERT_GE(x.size(), 6u);
  double x50 = NAN;
  for (std::size_t i = 1; i < x.size(); ++i)
    if (y[i - 1] < 0.5 && y[i] >= 0.5) x50 = x[i - 1] + (0.5 - y[i - 1]) / (y[i] - y[i - 1]) * (x[i] - x[i - 1]);
  const double threshold = 5.0;  // skerry extract's default detect.peak_snr
  EXPECT_NEAR(x50, threshold, 0.2);
  EXPECT_GE(y.back(), 0.99) << "at " << x.back() << " sigma";
  EXPECT_NEAR(x.back(), 2 * threshold, 1e-9);
}

TEST_F(PureNoise, SameTablesForAnyThreadCount) {
  std::string a, b;
  for (int threads : {1, 2}) {
    const fs::path out = dir_ / ("t" + std::to_string(threads));
    ASSERT_EQ(sh(std::string(SKERRY_BINARY) + " completeness " + image_ + " --out " + out.string() + " --threads " +
                 std::to_string(threads) + " --seed 5 --completeness.rounds 3 --completeness.per_round 40"), 0);
    (threads == 1 ? a : b) = slurp(out / "noise_1400MHz.injections.csv") + slurp(out / "noise_1400MHz.reliability.csv");
  }
  EXPECT_FALSE(a.empty());
  EXPECT_EQ(a, b);
}

}  // namespace
}  // namespace skerry
