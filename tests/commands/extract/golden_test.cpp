// Golden images: sources defined on the sky and rendered with astropy's WCS,
// independently of this project (tests/data/golden/README-extract.md). They
// check the whole chain -- pixel origin, parity, rotation, non-square pixels,
// Galactic frame, a pole, the PA convention, FWHM vs sigma and the beam area --
// against numbers from outside.
#include <gtest/gtest.h>

#include <cmath>

#include "extract_helpers.h"
#include "skerry/catalogue.h"
#include "skerry/constants.h"
#include "skerry/gaussian.h"
#include "skerry/sky.h"
#include "skerry/table_text.h"

namespace skerry::test {
namespace {

struct Truth {
  double ra, dec, s_int, s_peak, maj, min, pa, intrinsic_maj, intrinsic_min, intrinsic_pa;
};

std::vector<Truth> read_truth(const std::string& path) {
  CsvReadOptions o;
  o.comment = '#';
  const Table t = parse_csv(slurp(path), o);
  std::vector<Truth> v;
  for (std::size_t i = 0; i < t.rows(); ++i) {
    auto f = [&](const char* n) {
      const Column& c = t.at(n);
      return c.type == ColumnType::Int64 ? static_cast<double>(c.i64[i]) : c.f64[i];
    };
    v.push_back({f("ra_deg"), f("dec_deg"), f("s_int_jy"), f("s_peak_jy_per_beam"), f("maj_arcsec"),
                 f("min_arcsec"), f("pa_deg"), f("intrinsic_maj_arcsec"), f("intrinsic_min_arcsec"), f("intrinsic_pa_deg")});
  }
  return v;
}

double col(const Table& t, const char* name, std::size_t i) {
  const Column& c = t.at(name);
  return c.type == ColumnType::Int64 ? static_cast<double>(c.i64[i]) : c.f64[i];
}

/// Index of the component nearest to (ra, dec), and its separation [arcsec].
std::size_t nearest(const Table& comps, double ra, double dec, double* sep_arcsec) {
  std::size_t best = comps.rows();
  double bs = INFINITY;
  for (std::size_t i = 0; i < comps.rows(); ++i) {
    const double s = separation_deg(ra, dec, col(comps, "ra_deg", i), col(comps, "dec_deg", i)) * 3600.0;
    if (s < bs) { bs = s; best = i; }
  }
  *sep_arcsec = bs;
  return best;
}

double pa_diff(double a, double b) {  // difference of two axis PAs, in (-90, 90]
  double d = std::fmod(a - b, 180.0);
  if (d > 90.0) d -= 180.0;
  if (d <= -90.0) d += 180.0;
  return d;
}

struct GoldenCase {
  const char* name;
  double fixed_rms;  // rms given to the noiseless image (it has no noise to measure)
};

class GoldenNoiseless : public ::testing::TestWithParam<GoldenCase> {};

// Source of the expected values: the truth tables rendered with astropy
// (reference-data golden images). Tolerances as stated for these images: positions
// 1e-4 pixel, flux densities 1e-5 relative, sizes 1e-3 arcsec and PAs 1e-3 deg.
TEST_P(GoldenNoiseless, RecoversTruthExactly) {
  const GoldenCase gc = GetParam();
  TempDir tmp(gc.name);
  const std::string image = data_dir() + "/golden/" + gc.name + ".fits";
  const auto truth = read_truth(data_dir() + "/golden/" + gc.name + ".truth.csv");
  char rms[32];
  std::snprintf(rms, sizeof rms, "%g", gc.fixed_rms);
  const RunResult r = run_skerry({"extract", image, "--out", tmp.path(), "--noise.fixed_rms", rms,
                                  "--noise.fixed_background", "0", "--threads", "2"},
                                 tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  const Table comps = read_table(tmp / (std::string(gc.name) + ".components.csv"));
  ASSERT_EQ(comps.rows(), truth.size()) << "one component per truth source expected";
  const SkyImage img = read_sky_image(image);

  for (std::size_t k = 0; k < truth.size(); ++k) {
    const Truth& t = truth[k];
    SCOPED_TRACE("truth row " + std::to_string(k + 1));
    double sep;
    const std::size_t i = nearest(comps, t.ra, t.dec, &sep);
    ASSERT_LT(i, comps.rows());
    double tx, ty;
    ASSERT_TRUE(img.wcs->sky_to_pix(t.ra, t.dec, tx, ty));
    // Catalogue pixels are 1-based FITS pixels (docs/CONVENTIONS.md "Pixels and axes").
    EXPECT_NEAR(col(comps, "x_pix1", i) - 1.0, tx, 1e-4);
    EXPECT_NEAR(col(comps, "y_pix1", i) - 1.0, ty, 1e-4);
    const auto lg = local_geometry(*img.wcs, tx, ty);
    ASSERT_TRUE(lg.has_value());
    EXPECT_LT(sep, 1e-4 * std::sqrt(lg->pixel_area_arcsec2));
    EXPECT_NEAR(col(comps, "s_int_jy", i) / t.s_int, 1.0, 1e-5);
    EXPECT_NEAR(col(comps, "s_peak_jy_per_beam", i) / t.s_peak, 1.0, 1e-5);
    EXPECT_NEAR(col(comps, "maj_arcsec", i), t.maj, 1e-3);
    EXPECT_NEAR(col(comps, "min_arcsec", i), t.min, 1e-3);
    if (t.maj - t.min > 0.1) {
      EXPECT_NEAR(pa_diff(col(comps, "pa_deg", i), t.pa), 0.0, 1e-3);
    }
    if (t.intrinsic_maj > 0.0) {
      // Deconvolution (Wild 1970; REF-DECONV-01): the intrinsic shape comes back.
      EXPECT_NEAR(col(comps, "intrinsic_maj_arcsec", i), t.intrinsic_maj, 1e-3);
      EXPECT_NEAR(col(comps, "intrinsic_min_arcsec", i), t.intrinsic_min, 1e-3);
      EXPECT_NEAR(pa_diff(col(comps, "intrinsic_pa_deg", i), t.intrinsic_pa), 0.0, 1e-3);
      EXPECT_EQ(static_cast<std::int64_t>(col(comps, "info_bits", i)) & static_cast<std::int64_t>(kInfoUnresolved), 0);
    } else {
      EXPECT_NE(static_cast<std::int64_t>(col(comps, "info_bits", i)) & static_cast<std::int64_t>(kInfoUnresolved), 0)
          << "a point source must be flagged unresolved";
    }
  }
}

INSTANTIATE_TEST_SUITE_P(Golden, GoldenNoiseless,
                         ::testing::Values(GoldenCase{"parity_rotated_noiseless", 1e-5},
                                           GoldenCase{"galactic_tan_noiseless", 1e-5},
                                           GoldenCase{"pole_zea_noiseless", 1e-5},
                                           GoldenCase{"bands_1400MHz_noiseless", 1e-5},
                                           GoldenCase{"bands_3000MHz_noiseless", 1e-5}),
                         [](const auto& param_info) { return std::string(param_info.param.name); });

// Source: the noisy golden image (beam-correlated noise of rms 1e-4 Jy/beam
// added to the same sky). Each normalised residual (measured - true) / error
// is a draw from N(0, 1) when the errors are right (Condon 1997, PASP 109, 166,
// for the expected size of the errors). 8 sources x 6 quantities = 48 values:
// every |z| < 4 (chance of any exceeding: 48 x 6.3e-5 = 0.3 %), and their rms
// within [0.4, 1.8] (chi2_48 / 48 between its 0.1 % and 99.9 % points, widened
// for the correlations between quantities of one source).
TEST(GoldenNoisy, ResidualsConsistentWithErrors) {
  TempDir tmp("noisy");
  const std::string image = data_dir() + "/golden/parity_rotated_noisy.fits";
  const auto truth = read_truth(data_dir() + "/golden/parity_rotated_noisy.truth.csv");
  const RunResult r = run_skerry({"extract", image, "--out", tmp.path(), "--threads", "2"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  const Table comps = read_table(tmp / "parity_rotated_noisy.components.csv");
  double sum_z2 = 0.0;
  int n_z = 0;
  for (std::size_t k = 0; k < truth.size(); ++k) {
    const Truth& t = truth[k];
    SCOPED_TRACE("truth row " + std::to_string(k + 1));
    double sep;
    const std::size_t i = nearest(comps, t.ra, t.dec, &sep);
    ASSERT_LT(i, comps.rows());
    ASSERT_LT(sep, 3.0) << "no component within 3 arcsec";
    const double dec = col(comps, "dec_deg", i);
    double dra = col(comps, "ra_deg", i) - t.ra;
    if (dra > 180) dra -= 360;
    if (dra < -180) dra += 360;
    const double z[6] = {
        dra * std::cos(dec * kDegToRad) * 3600.0 / col(comps, "ra_err_arcsec", i),
        (dec - t.dec) * 3600.0 / col(comps, "dec_err_arcsec", i),
        (col(comps, "s_peak_jy_per_beam", i) - t.s_peak) / col(comps, "s_peak_err_jy_per_beam", i),
        (col(comps, "s_int_jy", i) - t.s_int) / col(comps, "s_int_err_jy", i),
        (col(comps, "maj_arcsec", i) - t.maj) / col(comps, "maj_err_arcsec", i),
        (col(comps, "min_arcsec", i) - t.min) / col(comps, "min_err_arcsec", i)};
    for (double v : z) {
      ASSERT_TRUE(std::isfinite(v));
      EXPECT_LT(std::abs(v), 4.0);
      sum_z2 += v * v;
      ++n_z;
    }
  }
  const double rms_z = std::sqrt(sum_z2 / n_z);
  EXPECT_GT(rms_z, 0.4);
  EXPECT_LT(rms_z, 1.8);
}

}  // namespace
}  // namespace skerry::test
