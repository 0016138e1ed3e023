// Beam-correlated noise: autocorrelation, rms, determinism.
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <Eigen/LU>
#include <cmath>
#include <cstring>

#include "skerry/constants.h"
#include "skerry/gaussian.h"
#include "skerry/simulate.h"

using namespace skerry;
using namespace skerry::sim;

namespace {

/// Sample autocorrelation coefficient at integer lag (dx, dy), periodic (the
/// simulated noise is periodic over the grid), mean removed.
double autocorr(const ImageF& n, long dx, long dy, double mean, double var) {
  const long ny = n.rows(), nx = n.cols();
  const long sx = ((dx % nx) + nx) % nx;
  double s = 0.0;
  for (long y = 0; y < ny; ++y) {
    const float* a = n.data() + y * nx;
    const float* b = n.data() + (((y + dy) % ny + ny) % ny) * nx;
    double row = 0.0;
    for (long x = 0; x < nx - sx; ++x) row += (a[x] - mean) * (b[x + sx] - mean);
    for (long x = nx - sx; x < nx; ++x) row += (a[x] - mean) * (b[x + sx - nx] - mean);
    s += row;
  }
  return s / (static_cast<double>(nx) * ny) / var;
}

void moments(const ImageF& n, double& mean, double& var) {
  double s = 0.0, s2 = 0.0;
  for (long i = 0; i < n.size(); ++i) s += n.data()[i];
  mean = s / n.size();
  for (long i = 0; i < n.size(); ++i) s2 += (n.data()[i] - mean) * (n.data()[i] - mean);
  var = s2 / n.size();
}

// Expected: rho(d) = exp(-0.5 d^T C^-1 d), i.e. exp(-4 ln 2 r^2 / theta^2) along each
// axis (docs/CONVENTIONS.md "Noise"; Gaussian beam, REF-GAUSS-01).
// Tolerance: the sampling error of a correlation coefficient estimated from N
// pixels of a Gaussian field is about sqrt(sum_k rho(k)^2 / N) (Bartlett 1946,
// J. R. Stat. Soc. Suppl. 8, 27, large-lag form; from memory), and sum_k rho^2 is
// the area of exp(-d^T C^-1 d) = Omega_beam_pix / 2. With 1024^2 pixels and an
// 8" x 4" beam at 1"/pixel (Omega = 36.3 pix) that is 0.0042; we allow 0.02
// (about 5 sigma): "within a few per cent".
TEST(CorrelatedNoise, AutocorrelationHasTheBeamShapeAlongItsAxes) {
  const Beam beam{8.0, 4.0, 0.0};  // major axis along north = +y
  const Eigen::Matrix2d c = beam_cov_pix_flat(beam, 1.0);
  EXPECT_NEAR(c(1, 1), 64.0 / (8.0 * kLn2), 1e-12);
  EXPECT_NEAR(c(0, 0), 16.0 / (8.0 * kLn2), 1e-12);
  const ImageF n = correlated_noise(1024, 1024, c, 1.0, 12345);
  double mean, var;
  moments(n, mean, var);
  for (long lag = 0; lag <= 12; ++lag) {
    const double r = static_cast<double>(lag);
    const double want_major = std::exp(-4.0 * kLn2 * r * r / (8.0 * 8.0));
    const double want_minor = std::exp(-4.0 * kLn2 * r * r / (4.0 * 4.0));
    EXPECT_NEAR(autocorr(n, 0, lag, mean, var), want_major, 0.02) << "major-axis lag " << lag;
    EXPECT_NEAR(autocorr(n, lag, 0, mean, var), want_minor, 0.02) << "minor-axis lag " << lag;
  }
  // Half maximum at half the FWHM along each axis: rho(theta/2) = 0.5.
  EXPECT_NEAR(autocorr(n, 0, 4, mean, var), 0.5, 0.02);
  EXPECT_NEAR(autocorr(n, 2, 0, mean, var), 0.5, 0.02);
}

TEST(CorrelatedNoise, AutocorrelationOfARotatedBeamAtEveryLag) {
  // PA 30 deg east of north on a grid with east to the left: the pixel-frame
  // covariance comes from the Jacobian (sky.h), so the lag pattern is tilted.
  const Beam beam{9.0, 4.5, 30.0};
  const Eigen::Matrix2d c = beam_cov_pix_flat(beam, 1.0, true);
  const ImageF n = correlated_noise(1024, 1024, c, 3.0, 777, 5);
  double mean, var;
  moments(n, mean, var);
  const Eigen::Matrix2d ci = c.inverse();
  double worst = 0.0;
  for (long dy = -8; dy <= 8; ++dy)
    for (long dx = -8; dx <= 8; ++dx) {
      const Eigen::Vector2d d(dx, dy);
      const double want = std::exp(-0.5 * d.dot(ci * d));
      worst = std::max(worst, std::abs(autocorr(n, dx, dy, mean, var) - want));
    }
  EXPECT_LT(worst, 0.02);
  // The direction of strongest correlation is the major axis: PA 30 east of north
  // with east = -x means the major axis points to (dx, dy) ~ (-sin 30, cos 30).
  EXPECT_GT(autocorr(n, -3, 5, mean, var), autocorr(n, 3, 5, mean, var) + 0.2);
}

// The rms equals the target within the sampling error of a standard deviation
// from N pixels of correlated noise: relative sigma = 0.5 sqrt(2 sum rho^2 / N)
// = 0.5 sqrt(Omega_beam_pix / N) (N / Omega_beam_pix independent samples,
// docs/CONVENTIONS.md "Noise"). 4 sigma allowed.
TEST(CorrelatedNoise, RmsEqualsTheTarget) {
  const Beam beam{6.0, 5.0, 70.0};
  const double pix = 1.5;
  const Eigen::Matrix2d c = beam_cov_pix_flat(beam, pix);
  const double omega_pix = kGaussAreaFactor * beam.maj_arcsec * beam.min_arcsec / (pix * pix);
  for (std::uint64_t seed : {1u, 2u, 3u}) {
    const ImageF n = correlated_noise(768, 512, c, 2e-5, seed);
    double mean, var;
    moments(n, mean, var);
    const double rel_sigma = 0.5 * std::sqrt(omega_pix / n.size());
    EXPECT_NEAR(std::sqrt(var) / 2e-5, 1.0, 4.0 * rel_sigma) << "seed " << seed;
    // The mean of N / Omega independent samples: sigma_mean = rms sqrt(Omega / N),
    // Omega = 2 pi sqrt(det C) = the area under the autocorrelation. 5 sigma.
    EXPECT_LT(std::abs(mean), 5.0 * 2e-5 * std::sqrt(2.0 * kPi * std::sqrt(c.determinant()) / n.size()));
  }
}

TEST(CorrelatedNoise, SameSeedSameBytesForAnyThreadCount) {
  const Eigen::Matrix2d c = beam_cov_pix_flat(Beam{7.0, 4.0, 20.0}, 1.2);
  ImageF ref;
  for (int threads : {1, 2, 8}) {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
    const ImageF n = correlated_noise(601, 355, c, 1.0, 99, 3);
    if (ref.size() == 0) {
      ref = n;
      continue;
    }
    ASSERT_EQ(n.size(), ref.size());
    EXPECT_EQ(std::memcmp(n.data(), ref.data(), sizeof(float) * n.size()), 0) << threads;
  }
  const ImageF other_seed = correlated_noise(601, 355, c, 1.0, 100, 3);
  const ImageF other_stream = correlated_noise(601, 355, c, 1.0, 99, 4);
  EXPECT_NE(std::memcmp(other_seed.data(), ref.data(), sizeof(float) * ref.size()), 0);
  EXPECT_NE(std::memcmp(other_stream.data(), ref.data(), sizeof(float) * ref.size()), 0);
  // Different realisations are uncorrelated with each other.
  double s = 0, a = 0, b = 0;
  for (long i = 0; i < ref.size(); ++i) {
    s += ref.data()[i] * other_seed.data()[i];
    a += ref.data()[i] * ref.data()[i];
    b += other_seed.data()[i] * other_seed.data()[i];
  }
  EXPECT_LT(std::abs(s / std::sqrt(a * b)), 0.05);
}

TEST(CorrelatedNoise, RejectsBadInput) {
  const Eigen::Matrix2d c = beam_cov_pix_flat(Beam{6.0, 5.0, 0.0}, 1.0);
  EXPECT_THROW(correlated_noise(0, 10, c, 1.0, 1), std::invalid_argument);
  EXPECT_THROW(correlated_noise(10, 10, c, -1.0, 1), std::invalid_argument);
  EXPECT_THROW(correlated_noise(10, 10, Eigen::Matrix2d::Zero(), 1.0, 1), std::invalid_argument);
}

}  // namespace

namespace {

// The pixel-frame beam covariance through a PixelSky (local Jacobian) agrees with
// the flat-grid form for both parities, and with the direct construction
// C_pix = 1/(8 ln 2) R diag(M^2, m^2) R^T, the major axis pointing to pixel
// direction (-sin PA, cos PA) when east is -x and (sin PA, cos PA) when east is +x
// (docs/CONVENTIONS.md "Angles on the sky").
TEST(BeamCovariance, ParityAndRotationInThePixelFrame) {
  const Beam beam{8.0, 4.0, 30.0};
  for (bool east_right : {false, true}) {
    const TanGrid grid = TanGrid::square(201.25, -38.6, 50.0, 50.0, 2.0, 0.0, east_right);
    const Eigen::Matrix2d a = beam_cov_pix(beam, grid, 50.0, 50.0);
    const Eigen::Matrix2d b = beam_cov_pix_flat(beam, 2.0, !east_right);
    EXPECT_LT((a - b).cwiseAbs().maxCoeff(), 1e-9);
    const double pa = 30.0 * kDegToRad, s = east_right ? 1.0 : -1.0;
    const Eigen::Vector2d u(s * std::sin(pa), std::cos(pa)), v(std::cos(pa), -s * std::sin(pa));
    const Eigen::Matrix2d c = (16.0 * u * u.transpose() + 4.0 * v * v.transpose()) / (8.0 * kLn2);
    EXPECT_LT((b - c).cwiseAbs().maxCoeff(), 1e-12) << east_right;
  }
}

}  // namespace
