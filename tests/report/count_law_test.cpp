// A known source-count law recovered through the whole pipeline: `skerry simulate`
// draws point sources from dN/dS proportional to S^-2.5 (the Euclidean slope),
// `skerry extract` measures them, and the Euclidean-normalised counts of the
// catalogue (modules/quality, as the report plots them) agree bin by bin with the
// law above 10 sigma.
//
// For an unresolved source the integrated flux density equals the peak (definition
// of Jy/beam, common practice) and the fitted peak is the better-measured of the
// two (Condon 1997, PASP 109, 166: sigma_S_int = sqrt(3) sigma_peak for a point
// source, REF-CONDON-02), so the counts use the peak. Expected count in [lo, hi):
//   N_bin = N (lo^(1-g) - hi^(1-g)) / (S_min^(1-g) - S_max^(1-g)),  g = 2.5
// (the integral of the drawn power law). Tolerance: 3 Poisson sigma plus 5 % for
// the Eddington bias that remains at 10 sigma with steep counts (REF-COMPL-02).
#include <gtest/gtest.h>

#include <sys/wait.h>
#include <unistd.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>

#include "io/table_io.h"
#include "skerry/quality.h"

namespace fs = std::filesystem;

namespace skerry {
namespace {

int sh(const std::string& c) {
  const int rc = std::system((c + " >/dev/null 2>&1 </dev/null").c_str());
  return WIFEXITED(rc) ? WEXITSTATUS(rc) : -1;
}

TEST(CountLaw, EuclideanCountsRecoveredAboveTenSigma) {
  const fs::path dir = fs::temp_directory_path() / ("skerry_count_law_test_" + std::to_string(::getpid()));
  fs::remove_all(dir);
  fs::create_directories(dir);
  const std::string sk = SKERRY_BINARY;
  const double n_drawn = 8000, slope = 2.5, s_min = 5e-5, s_max = 0.05, rms = 2e-5;
  ASSERT_EQ(sh(sk + " simulate --out " + dir.string() +
               " --bands.freqs_mhz 1400 --sources.count 8000 --sources.slope 2.5"
               " --sources.s_min_jy 5e-5 --sources.s_max_jy 0.05 --sources.resolved_fraction 0"
               " --sources.double_fraction 0 --primary_beam.fwhm_deg 0 --background.amplitude_jy_per_beam 0"
               " --noise.rms_jy_per_beam 2e-5 --field.size_pix 2048 --output.primary_beam_images false"
               " --output.name law"),
            0);
  ASSERT_EQ(sh(sk + " extract " + (dir / "law_1400MHz.fits").string() + " --out " + (dir / "run").string() +
               " --output.formats csv --output.maps false --output.model false --output.residual false"),
            0);
  const Table t = read_table((dir / "run/law_1400MHz.components.csv").string());
  const std::vector<double>& peak = t.at("s_peak_jy_per_beam").f64;
  ASSERT_GT(peak.size(), 500u);

  CountsOptions o;
  for (int i = 0; i <= 6; ++i) o.edges_jy.push_back(10 * rms * std::pow(10.0, i / 2.0));  // from 10 sigma
  const double area_sr = 1e-3;  // any constant: the comparison is of counts per bin
  const auto bins = euclidean_counts(peak, o, [&](double) { return area_sr; });
  ASSERT_EQ(bins.size(), 6u);
  const double norm = n_drawn / (std::pow(s_min, 1 - slope) - std::pow(s_max, 1 - slope));
  int checked = 0;
  for (const auto& b : bins) {
    const double expect = norm * (std::pow(b.lo_jy, 1 - slope) - std::pow(b.hi_jy, 1 - slope));
    // The Euclidean normalisation of the bin, as the report plots it.
    EXPECT_NEAR(b.euclid, std::pow(b.centre_jy, 2.5) * b.n / (area_sr * (b.hi_jy - b.lo_jy)),
                1e-9 * (1 + b.euclid));
    if (expect < 5) continue;
    ++checked;
    EXPECT_NEAR(static_cast<double>(b.n), expect, 3 * std::sqrt(expect) + 0.05 * expect)
        << "bin [" << b.lo_jy << ", " << b.hi_jy << ") Jy";
  }
  EXPECT_GE(checked, 3);
  fs::remove_all(dir);
}

}  // namespace
}  // namespace skerry
