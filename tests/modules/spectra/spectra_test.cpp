// Spectral index and curvature against published worked examples.
#include "skerry/spectra.h"

#include <gtest/gtest.h>

#include <cmath>
#include <vector>

namespace skerry {
namespace {

// Relative closeness with a printed value on failure.
void expect_rel(double got, double want, double rel) {
  EXPECT_NEAR(got, want, rel * std::abs(want)) << "got " << got << " want " << want;
}

const std::vector<double> kFreqGHz{0.15, 0.61, 1.4, 3.0, 5.5};

// Source: REF-SPIX-01, first-order error propagation (Bevington & Robinson,
// Data Reduction and Error Analysis for the Physical Sciences, 3rd ed. 2003,
// ch. 3; from memory). S1 = 10.0 +- 0.5 mJy at 1.4 GHz, S2 = 4.0 +- 0.3 mJy at 3.0 GHz.
TEST(TwoPoint, WorkedExample) {
  double a, e;
  two_point_alpha(1.4e9, 10.0e-3, 0.5e-3, 3.0e9, 4.0e-3, 0.3e-3, a, e);
  expect_rel(a, -1.202260305587211, 1e-14);
  expect_rel(e, 0.11827062709079779, 1e-14);
  // The N-band fit with two bands reduces to the same numbers (REF-SPIX-02 with N = 2).
  SpectrumResult r = fit_spectrum({{1.4e9, 10.0e-3, 0.5e-3}, {3.0e9, 4.0e-3, 0.3e-3}});
  ASSERT_EQ(r.status, SpectrumStatus::Fitted);
  expect_rel(r.alpha, -1.202260305587211, 1e-12);
  expect_rel(r.alpha_err, 0.11827062709079779, 1e-12);
  EXPECT_TRUE(std::isnan(r.chi2_power_law));  // 2 bands: no goodness of fit
  EXPECT_EQ(r.dof_power_law, 0);
  // nu0 = weighted log mean: w = (S/sigma)^2 = 400 and 177.78 (docs/CONVENTIONS.md).
  const double w1 = 400.0, w2 = (4.0 / 0.3) * (4.0 / 0.3);
  expect_rel(r.ref_freq_hz, std::exp((w1 * std::log(1.4e9) + w2 * std::log(3.0e9)) / (w1 + w2)),
             1e-13);
}

// Source: REF-SPIX-01 with a flux-scale term added in quadrature per band
// (independent between bands, spectra.h; common practice): relative errors
// become sqrt((s/S)^2 + f^2).
TEST(TwoPoint, FluxScaleTermWidensError) {
  const double f = 0.05;
  SpectrumResult r = fit_spectrum({{1.4e9, 10.0e-3, 0.5e-3, 0.0, f}, {3.0e9, 4.0e-3, 0.3e-3, 0.0, f}});
  const double want = std::sqrt(0.05 * 0.05 + f * f + 0.075 * 0.075 + f * f) / std::log(3.0 / 1.4);
  expect_rel(r.alpha_err, want, 1e-12);
  expect_rel(r.alpha, -1.202260305587211, 1e-12);
}

// Source: REF-SPIX-02 example 1 (weighted least squares in log space, common
// practice; numpy.polyfit agrees per docs/REFERENCES.md): exact power law
// S = 20 mJy (nu/GHz)^-0.7 with 5 % errors.
TEST(PowerLaw, ExactPowerLaw) {
  std::vector<BandFlux> b;
  for (double f : kFreqGHz) {
    const double s = 20e-3 * std::pow(f, -0.7);
    b.push_back({f * 1e9, s, 0.05 * s});
  }
  SpectrumResult r = fit_spectrum(b);
  ASSERT_EQ(r.status, SpectrumStatus::Fitted);
  EXPECT_NEAR(r.alpha, -0.7, 1e-14);
  expect_rel(r.alpha_err, 0.017724595165754656, 1e-12);
  // S(1 GHz) from the fit at nu0.
  expect_rel(r.flux_ref_jy * std::pow(1e9 / r.ref_freq_hz, r.alpha), 20e-3, 1e-12);
  EXPECT_NEAR(r.chi2_power_law, 0.0, 1e-20);
  EXPECT_EQ(r.dof_power_law, 3);
}

// Source: REF-SPIX-02 example 2 (quoted flux densities and errors).
TEST(PowerLaw, QuotedData) {
  const std::vector<double> s{75.0, 28.0, 15.2, 8.1, 5.3}, e{4.0, 1.5, 0.8, 0.5, 0.4};
  std::vector<BandFlux> b;
  for (int i = 0; i < 5; ++i) b.push_back({kFreqGHz[i] * 1e9, s[i] * 1e-3, e[i] * 1e-3});
  SpectrumResult r = fit_spectrum(b);
  expect_rel(r.alpha, -0.7384886307650118, 1e-12);
  expect_rel(r.alpha_err, 0.021286366400679112, 1e-12);
  expect_rel(r.flux_ref_jy * std::pow(1e9 / r.ref_freq_hz, r.alpha), 18.915116129374905e-3, 1e-12);
  expect_rel(r.chi2_power_law, 1.1588859305326187, 1e-12);
  EXPECT_EQ(r.dof_power_law, 3);
  // Log-parabola on the same data (REF-SPIX-03 example 2): q = c2 / ln 10 is
  // independent of the reference frequency; chi2 0.41945086392538067 (2 dof).
  ASSERT_TRUE(r.flags & kSpecCurvatureFitted);
  expect_rel(r.curv_q, -0.016574122380183506, 1e-10);
  expect_rel(r.curv_q_err, 0.04438091059508765 / std::log(10.0), 1e-10);
  expect_rel(r.chi2_curved, 0.41945086392538067, 1e-10);
  EXPECT_EQ(r.dof_curved, 2);
  // Local index at 1.4 GHz: alpha0 + 2 q ln(nu/nu0) = -0.7572903814058711.
  expect_rel(r.curv_alpha0 + 2.0 * r.curv_q * std::log(1.4e9 / r.ref_freq_hz),
             -0.7572903814058711, 1e-10);
  // Intercept/slope decorrelation at nu0: the power-law error of S0 is
  // 1/sqrt(sum w) in ln S (property of the weighted mean, common practice).
  double sw = 0.0;
  for (int i = 0; i < 5; ++i) sw += (s[i] / e[i]) * (s[i] / e[i]);
  expect_rel(r.flux_ref_err_jy / r.flux_ref_jy, 1.0 / std::sqrt(sw), 1e-12);
}

// Source: REF-SPIX-03 example 1 (log-parabola of Massaro et al. 2004, A&A 413,
// 489; base 10, nu0 = 1 GHz): exact c = (1.0, -0.5, -0.2) with 5 % errors; the
// base-10 coefficients follow from the natural-log fit by c0 = lnS0/ln10,
// c1 = alpha, c2 = q ln10.
TEST(LogParabola, Base10WorkedExample) {
  const std::vector<double> s{18.888142378663073, 12.53482937097668, 8.368840707921267,
                              5.198887674398078, 3.3127699104037487};
  std::vector<double> x, y, w;
  for (int i = 0; i < 5; ++i) {
    x.push_back(std::log(kFreqGHz[i]));
    y.push_back(std::log(s[i]));
    w.push_back(1.0 / (0.05 * 0.05));
  }
  std::vector<double> c, cov;
  double chi2;
  ASSERT_TRUE(fit_log_polynomial(x, y, w, 2, c, cov, chi2));
  const double ln10 = std::log(10.0);
  EXPECT_NEAR(c[0] / ln10, 1.0, 1e-12);
  EXPECT_NEAR(c[1], -0.5, 1e-12);
  EXPECT_NEAR(c[2] * ln10, -0.2, 1e-12);
  // Published errors are given to 7 significant digits.
  EXPECT_NEAR(std::sqrt(cov[0]) / ln10, 0.01519249, 5e-9);
  EXPECT_NEAR(std::sqrt(cov[4]), 0.01811721, 5e-9);
  EXPECT_NEAR(std::sqrt(cov[8]) * ln10, 0.03739301, 5e-9);
  // Turnover at X = -c1 / (2 c2) -> 0.05623413251903491 GHz.
  expect_rel(std::exp(-c[1] / (2.0 * c[2])), 0.05623413251903491, 1e-10);
}

// Source: docs/CONVENTIONS.md "Spectra": three bands give alpha with 1 dof and a
// log-parabola with 0 dof (no goodness of fit).
TEST(LogParabola, ThreeBandsNoGoodnessOfFit) {
  SpectrumResult r = fit_spectrum({{1e9, 1.0, 0.01}, {2e9, 0.7, 0.01}, {4e9, 0.4, 0.01}});
  EXPECT_EQ(r.dof_power_law, 1);
  EXPECT_TRUE(std::isfinite(r.chi2_power_law));
  ASSERT_TRUE(r.flags & kSpecCurvatureFitted);
  EXPECT_TRUE(std::isfinite(r.curv_q_err));
  EXPECT_TRUE(std::isnan(r.chi2_curved));
  EXPECT_EQ(r.dof_curved, 0);
  EXPECT_LT(r.curv_q, 0.0);  // ln 0.7 - ln 1 > ln 0.4 - ln 0.7 over equal log steps: convex down
}

// Source: docs/CONVENTIONS.md "Spectra": a band below detect_snr * rms is an upper
// limit, never logged; alpha limits follow from alpha = ln(U/S_d)/ln(nu_u/nu_d)
// (REF-SPIX-01 form).
TEST(Limits, UpperLimitBandsGiveAlphaLimits) {
  // Detected at 1.4 GHz; negative forced flux at 3 GHz (rms 0.1 mJy), and 0.1 mJy
  // at 0.9 GHz (rms 0.2 mJy).
  SpectrumResult r = fit_spectrum(
      {{0.9e9, 0.1e-3, 0.2e-3}, {1.4e9, 5e-3, 0.1e-3}, {3.0e9, -0.05e-3, 0.1e-3}});
  EXPECT_EQ(r.status, SpectrumStatus::LimitOnly);
  EXPECT_EQ(r.n_detected, 1);
  EXPECT_EQ(r.n_limits, 2);
  EXPECT_TRUE(r.flags & kSpecHasLimits);
  EXPECT_TRUE(std::isnan(r.alpha));
  expect_rel(r.alpha_upper_limit, std::log(0.3e-3 / 5e-3) / std::log(3.0 / 1.4), 1e-12);
  expect_rel(r.alpha_lower_limit, std::log(0.6e-3 / 5e-3) / std::log(0.9 / 1.4), 1e-12);
  EXPECT_EQ(r.ref_freq_hz, 1.4e9);
  // Settable threshold: with detect_snr 0.4 the 0.9 GHz band counts as detected.
  SpectraOptions o;
  o.detect_snr = 0.4;
  SpectrumResult r2 = fit_spectrum(
      {{0.9e9, 0.1e-3, 0.2e-3}, {1.4e9, 5e-3, 0.1e-3}, {3.0e9, -0.05e-3, 0.1e-3}}, o);
  EXPECT_EQ(r2.status, SpectrumStatus::Fitted);
  EXPECT_EQ(r2.n_detected, 2);
}

TEST(Limits, NothingDetected) {
  SpectrumResult r = fit_spectrum({{1.4e9, 0.1e-3, 0.1e-3}, {3e9, 0.0, 0.1e-3}});
  EXPECT_EQ(r.status, SpectrumStatus::NoData);
  EXPECT_TRUE(std::isnan(r.alpha));
}

TEST(Edge, InvalidBandsIgnoredAndEqualFrequencies) {
  SpectrumResult r = fit_spectrum({{1.4e9, NAN, 0.1e-3}, {1.4e9, 5e-3, 0.1e-3}, {1.4e9, 4e-3, 0.1e-3}});
  EXPECT_TRUE(r.flags & kSpecInvalidBand);
  EXPECT_EQ(r.n_bands, 2);
  EXPECT_NE(r.status, SpectrumStatus::Fitted);  // one distinct frequency: no index
  EXPECT_TRUE(std::isnan(r.alpha));
}

// Source: the chi2 distribution (common practice): a spectrum with a 10-sigma
// kink gives a p-value far below 1e-3 and is flagged; a straight one is not.
TEST(PowerLaw, PoorFitFlag) {
  SpectrumResult bad = fit_spectrum({{1e9, 1.0, 0.01}, {2e9, 2.0, 0.01}, {4e9, 1.0, 0.01}});
  EXPECT_TRUE(bad.flags & kSpecPoorPowerLaw);
  SpectrumResult good = fit_spectrum({{1e9, 1.0, 0.01}, {2e9, 0.5, 0.01}, {4e9, 0.25, 0.01}});
  EXPECT_FALSE(good.flags & kSpecPoorPowerLaw);
  EXPECT_NEAR(good.alpha, -1.0, 1e-12);
}

TEST(Batch, SameAsSingle) {
  std::vector<std::vector<BandFlux>> many;
  for (int i = 0; i < 1000; ++i)
    many.push_back({{1e9, 1.0 + 0.001 * i, 0.01}, {2e9, 0.5, 0.01}, {4e9, 0.3, 0.02}});
  auto out = fit_spectra(many);
  ASSERT_EQ(out.size(), many.size());
  for (int i = 0; i < 1000; i += 97) EXPECT_EQ(out[i].alpha, fit_spectrum(many[i]).alpha);
}

}  // namespace
}  // namespace skerry
