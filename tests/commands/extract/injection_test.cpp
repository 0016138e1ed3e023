// Injection tests (truth known by construction): completeness by true injected
// SNR, reliability, and false detections on the negated image against pure-noise
// simulations. Point sources on a jittered lattice (isolated: 64 pixels = 9 beams
// apart, none within 48 pixels of the edge) on the simulator's beam-correlated
// noise, 1024^2 pixels of 1 arcsec, beam 7 x 5 arcsec at PA 30 deg, 6 seeds.
// Sources are selected by their TRUE SNR (docs/CONVENTIONS.md "Signal-to-noise").
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>

#include "extract_helpers.h"
#include "skerry/sky.h"

namespace skerry::test {
namespace {

const Beam kBeam{7.0, 5.0, 30.0};
constexpr long kN = 1024;
constexpr double kRms = 1e-4;
constexpr int kSeeds = 6;
constexpr double kMatchArcsec = 5.0;  // 0.7 beam: far above the position errors at SNR >= 3

struct Detection {
  double ra, dec, snr;
};

std::vector<Detection> detections(const std::string& csv) {
  const Table t = read_table(csv);
  std::vector<Detection> d;
  for (std::size_t i = 0; i < t.rows(); ++i)
    d.push_back({t.at("ra_deg").f64[i], t.at("dec_deg").f64[i], t.at("snr").f64[i]});
  return d;
}

bool has_match(const std::vector<Detection>& d, double ra, double dec, double radius_arcsec) {
  for (const auto& x : d)
    if (separation_deg(ra, dec, x.ra, x.dec) * 3600.0 <= radius_arcsec) return true;
  return false;
}

/// Normal CDF.
double Phi(double z) { return 0.5 * std::erfc(-z / std::sqrt(2.0)); }

struct Field {
  std::vector<Injected> truth;
  std::vector<Detection> found;
};

class Injection : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    tmp_ = new TempDir("inject");
    for (int s = 0; s < kSeeds; ++s) {
      const std::string img = *tmp_ / ("field" + std::to_string(s) + ".fits");
      // Every third source bright (true SNR 10..50), the others near the
      // threshold (true SNR 3..7).
      auto snr_of = [](std::size_t i, std::mt19937_64& rng) {
        std::uniform_real_distribution<double> u(0.0, 1.0);
        return i % 3 == 0 ? 10.0 + 40.0 * u(rng) : 3.0 + 4.0 * u(rng);
      };
      Field f;
      f.truth = write_point_field(img, kN, 1.0, kBeam, kRms, 64, 8.0, 48, 100 + s, snr_of);
      const RunResult r = run_skerry({"extract", img, "--out", *tmp_ / "out", "--output.formats", "csv",
                                      "--output.maps", "false", "--output.model", "false",
                                      "--output.residual", "false"},
                                     tmp_->path());
      ASSERT_EQ(r.code, 0) << r.err;
      f.found = detections(*tmp_ / ("out/field" + std::to_string(s) + ".components.csv"));
      fields_.push_back(std::move(f));
    }
  }
  static void TearDownTestSuite() {
    delete tmp_;
    tmp_ = nullptr;
    fields_.clear();
  }
  static TempDir* tmp_;
  static std::vector<Field> fields_;
};
TempDir* Injection::tmp_ = nullptr;
std::vector<Field> Injection::fields_;

// REF-COMPL-01 (common practice for Gaussian noise): a point source of true peak
// S is found with probability Phi((S - T)/sigma), 50 % at the threshold T. T is
// fitted by maximum likelihood to the detected/missed outcomes of the ~790
// sources with true SNR 3..7 (its statistical error is ~0.06 sigma); it must lie
// within 0.2 sigma of the peak threshold detect.peak_snr = 5.
TEST_F(Injection, FiftyPercentCompletenessAtThePeakThreshold) {
  std::vector<std::pair<double, bool>> outcome;
  for (const auto& f : fields_)
    for (const auto& t : f.truth)
      if (t.snr_true < 8.0) outcome.emplace_back(t.snr_true, has_match(f.found, t.ra, t.dec, kMatchArcsec));
  ASSERT_GT(outcome.size(), 600u);
  auto nll = [&](double T) {
    double s = 0;
    for (const auto& [snr, det] : outcome) {
      const double p = std::clamp(Phi(snr - T), 1e-12, 1 - 1e-12);
      s -= det ? std::log(p) : std::log(1 - p);
    }
    return s;
  };
  double a = 3.0, b = 7.0;  // golden-section search for the minimum
  const double g = (std::sqrt(5.0) - 1) / 2;
  for (int it = 0; it < 80; ++it) {
    const double c = b - g * (b - a), d = a + g * (b - a);
    if (nll(c) < nll(d)) b = d; else a = c;
  }
  const double T = 0.5 * (a + b);
  std::string bins;
  for (double lo = 3.0; lo < 7.0; lo += 0.5) {
    int n = 0, k = 0;
    for (const auto& [snr, det] : outcome)
      if (snr >= lo && snr < lo + 0.5) { ++n; k += det; }
    char buf[96];
    std::snprintf(buf, sizeof buf, "  SNR %.1f-%.1f: %d/%d (model %.2f)\n", lo, lo + 0.5, k, n, Phi(lo + 0.25 - T));
    bins += buf;
  }
  std::printf("completeness: fitted 50%% point T = %.3f (peak threshold 5)\n%s", T, bins.c_str());
  EXPECT_NEAR(T, 5.0, 0.2) << "fitted 50% point " << T << "\n" << bins;
}

// At least 99.5 % of isolated sources above 10 sigma, away from edges, are found;
// every miss is listed.
TEST_F(Injection, BrightIsolatedSourcesAreFound) {
  int n = 0, missed = 0;
  std::string list;
  for (std::size_t s = 0; s < fields_.size(); ++s)
    for (const auto& t : fields_[s].truth) {
      if (t.snr_true < 10.0) continue;
      ++n;
      if (!has_match(fields_[s].found, t.ra, t.dec, kMatchArcsec)) {
        ++missed;
        char buf[128];
        std::snprintf(buf, sizeof buf, "  missed: field %zu x=%.2f y=%.2f true SNR %.2f\n", s, t.x, t.y, t.snr_true);
        list += buf;
      }
    }
  ASSERT_GT(n, 300);
  EXPECT_GE(1.0 - static_cast<double>(missed) / n, 0.995) << list;
  EXPECT_EQ(missed, 0) << list;  // each miss listed; with ~390 sources one miss is already 99.74 %
}

// Reliability: at least 99.5 % of the components with measured SNR > 5 lie
// within 1 beam of an injected source.
TEST_F(Injection, ReliabilityAboveFiveSigma) {
  int n = 0, spurious = 0;
  std::string list;
  for (std::size_t s = 0; s < fields_.size(); ++s)
    for (const auto& d : fields_[s].found) {
      if (!(d.snr > 5.0)) continue;
      ++n;
      bool ok = false;
      for (const auto& t : fields_[s].truth)
        if (separation_deg(t.ra, t.dec, d.ra, d.dec) * 3600.0 <= kBeam.maj_arcsec) { ok = true; break; }
      if (!ok) {
        ++spurious;
        char buf[128];
        std::snprintf(buf, sizeof buf, "  unmatched: field %zu ra=%.6f dec=%.6f SNR %.2f\n", s, d.ra, d.dec, d.snr);
        list += buf;
      }
    }
  ASSERT_GT(n, 600);
  EXPECT_GE(1.0 - static_cast<double>(spurious) / n, 0.995) << list;
}

// False detections: the negated images (sources become holes, the noise is as
// before) give as many detections as pure-noise images made with the same beam,
// grid and settings. The analytic counts per pixel or per beam are both wrong
// for correlated noise, so the reference is the mean over 10 noise-only
// simulations. A lower threshold (4 sigma) makes the counts large enough to
// compare. Tolerance: 3 sigma of the difference, sigma^2 = 6 m (Poisson count
// of the 6 negated images) + 36 m / 10 (error of the 10-image mean m).
TEST_F(Injection, NegatedImageMatchesPureNoise) {
  const std::vector<std::string> low = {"--detect.peak_snr", "4", "--detect.grow_snr", "3",
                                        "--output.formats", "csv", "--output.maps", "false",
                                        "--output.model", "false", "--output.residual", "false"};
  auto count = [&](const std::string& img) {
    std::vector<std::string> a = {"extract", img, "--out", *tmp_ / "neg"};
    a.insert(a.end(), low.begin(), low.end());
    const RunResult r = run_skerry(a, tmp_->path());
    EXPECT_EQ(r.code, 0) << r.err;
    const std::string stem = fs::path(img).stem().string();
    return static_cast<double>(read_table(*tmp_ / ("neg/" + stem + ".components.csv")).rows());
  };
  auto snr_of = [](std::size_t i, std::mt19937_64& rng) {
    std::uniform_real_distribution<double> u(0.0, 1.0);
    return i % 3 == 0 ? 10.0 + 40.0 * u(rng) : 3.0 + 4.0 * u(rng);
  };
  double n_neg = 0;
  for (int s = 0; s < kSeeds; ++s) {
    const std::string img = *tmp_ / ("negated" + std::to_string(s) + ".fits");
    write_point_field(img, kN, 1.0, kBeam, kRms, 64, 8.0, 48, 100 + s, snr_of, -1.0);
    n_neg += count(img);
  }
  double n_noise = 0;
  const int n_sims = 10;
  for (int k = 0; k < n_sims; ++k) {
    const std::string img = *tmp_ / ("noise" + std::to_string(k) + ".fits");
    write_point_field(img, kN, 1.0, kBeam, kRms, 64, 8.0, 48, 500 + k, snr_of, 1.0, /*with_sources=*/false);
    n_noise += count(img);
  }
  const double m = n_noise / n_sims;
  ASSERT_GT(m, 2.0) << "too few noise detections for a meaningful comparison";
  const double expected = kSeeds * m;
  const double sigma = std::sqrt(kSeeds * m + kSeeds * kSeeds * m / n_sims);
  std::printf("false detections at 4 sigma: negated %.0f, pure noise %.2f +- %.2f\n", n_neg, expected, sigma);
  EXPECT_LE(std::abs(n_neg - expected), 3.0 * sigma)
      << "negated: " << n_neg << ", pure noise: " << expected << " +- " << sigma;
}

}  // namespace
}  // namespace skerry::test
