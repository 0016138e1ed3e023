// External check: the same stamp, model and weights fitted by skerry and by
// scipy.optimize.least_squares (Debian's python3-scipy; trust-region reflective
// with its own finite-difference Jacobian) agree within 1e-3 of each parameter's
// error (issue requirement). The stamp is a resolved Gaussian in beam-correlated
// noise (the simulator's noise); only the island pixels are fitted, weights 1/rms.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <string>
#include <unistd.h>

#include "skerry/fitting.h"
#include "skerry/simulate.h"
#include "test_helpers.h"

namespace {

std::string python() {
  // Debian's interpreter first: it is the one with python3-numpy/python3-scipy.
  return std::filesystem::exists("/usr/bin/python3") ? "/usr/bin/python3" : "python3";
}

TEST(ScipyComparison, SameStampSameParameters) {
  const skerry::Beam beam{12.0, 8.0, 30.0};
  const auto sky = skerry::sim::TanGrid::square(201.25, -38.6, 24, 24, 2.0, 10.0);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, beam, 24, 24);
  skerry::ImageF img = skerry::sim::correlated_noise(48, 48, bp, 1e-4, 31337);
  double ra, dec;
  sky.pix_to_sky(24.3, 23.6, ra, dec);
  fittest::render_sky_gaussian(img, sky, ra, dec, 2.5e-3, skerry::convolve({9.0, 4.0, 70.0}, skerry::to_ellipse(beam)));
  const skerry::IslandCutout cut = fittest::make_cutout(img, 1e-4, 0, 0, 48, 48, 3.0, bp);
  const skerry::IslandFit fit = skerry::fit_island(cut, {});
  ASSERT_EQ(fit.components.size(), 1u);
  const skerry::PixelComponent& c = fit.components[0];
  ASSERT_EQ(c.status, skerry::ComponentStatus::kFitted);

  const auto dir = std::filesystem::temp_directory_path() /
                   ("skerry_scipy_" + std::to_string(::getpid()));
  std::filesystem::create_directories(dir);
  const auto stamp = dir / "stamp.txt";
  {
    std::ofstream out(stamp);
    out.precision(17);
    // Start point: the brightest pixel with the beam's shape (scipy starts on its own).
    int bx = 0, by = 0;
    for (int y = 0; y < 48; ++y)
      for (int x = 0; x < 48; ++x)
        if (cut.mask(y, x) == skerry::kCutoutIsland && cut.data(y, x) > cut.data(by, bx)) {
          bx = x;
          by = y;
        }
    const double a = bp(0, 0), d = bp(1, 1), b = bp(0, 1);
    const double mean = 0.5 * (a + d), half = std::hypot(0.5 * (a - d), b);
    out << cut.data(by, bx) << ' ' << bx << ' ' << by << ' ' << std::sqrt(mean + half) << ' '
        << std::sqrt(mean - half) << ' ' << 0.5 * std::atan2(2 * b, a - d) << '\n';
    for (int y = 0; y < 48; ++y)
      for (int x = 0; x < 48; ++x)
        if (cut.mask(y, x) == skerry::kCutoutIsland)
          out << x << ' ' << y << ' ' << static_cast<double>(cut.data(y, x)) << ' '
              << 1.0 / static_cast<double>(cut.rms(y, x)) << '\n';
  }
  const std::string cmd = python() + " " + SKERRY_SOURCE_DIR + "/tests/modules/fitting/scipy_stamp_fit.py " +
                          stamp.string() + " 2>&1";
  FILE* pipe = ::popen(cmd.c_str(), "r");
  ASSERT_NE(pipe, nullptr);
  std::string text;
  char buf[512];
  while (std::fgets(buf, sizeof buf, pipe)) text += buf;
  const int rc = ::pclose(pipe);
  std::filesystem::remove_all(dir);
  ASSERT_EQ(rc, 0) << cmd << "\n" << text;
  double q[6];
  ASSERT_EQ(std::sscanf(text.c_str(), "%lf %lf %lf %lf %lf %lf", &q[0], &q[1], &q[2], &q[3], &q[4], &q[5]), 6)
      << text;
  const double p[6] = {c.amplitude, c.x, c.y, c.sigma_major_pix, c.sigma_minor_pix, c.theta_rad};
  const char* names[6] = {"amplitude", "x", "y", "sigma_major", "sigma_minor", "theta"};
  for (int j = 0; j < 6; ++j) {
    const double err = std::sqrt(c.cov(j, j));
    ASSERT_TRUE(std::isfinite(err) && err > 0.0);
    std::printf("%-12s skerry %.12g scipy %.12g |difference| / error %.2e\n", names[j], p[j], q[j],
                std::abs(p[j] - q[j]) / err);
    EXPECT_NEAR(p[j], q[j], 1e-3 * err) << names[j] << ": skerry " << p[j] << " scipy " << q[j]
                                        << " error " << err;
  }
}

}  // namespace
