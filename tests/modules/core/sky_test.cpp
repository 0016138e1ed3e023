// Separations and position angles checked against ERFA (IAU SOFA routines).
#include <erfa.h>
#include <gtest/gtest.h>

#include <random>

#include "skerry/constants.h"
#include "skerry/sky.h"

using namespace skerry;

// Source: REF-SEP-02 (50-digit reference values; ERFA eraSeps agrees to 5e-16 rad).
TEST(Separation, PublishedCheckValues) {
  struct Row { double a1, d1, a2, d2, rad; };
  const Row rows[] = {
      {10, 20, 10.001, 20.001, 2.3949940747106935e-05},
      {359.9999, 0, 0.0001, 0, 3.4906585035505458e-06},
      {0, 89.9999, 180, 89.9999, 3.4906585041045370e-06},
      {0, 89.99, 90, 89.99, 2.4682682927124868e-04},
      {0, 0, 90, 0, 1.5707963267948966},
      {83.63308333, 22.0145, 187.70593075, 12.39112331, 1.7109957032912533},
      {0, 0, 179.9999, 0.0001, 3.1415901853214942},
      {45, -89.999, 225, 89.999, 3.1415926535897932},
      {150, 2, 150, 2 + 1 / 3.6e6, 4.8481368091894163e-09},
  };
  for (const auto& r : rows)
    EXPECT_NEAR(separation_deg(r.a1, r.d1, r.a2, r.d2) * kDegToRad, r.rad, 1e-12) << r.a1 << " " << r.d1;
}

// Source: ERFA eraSeps and eraPas (IAU SOFA), random pairs over the sphere.
TEST(Separation, AgreesWithErfa) {
  std::mt19937_64 rng(7);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  for (int i = 0; i < 2000; ++i) {
    const double a1 = 360 * u(rng), d1 = std::asin(2 * u(rng) - 1) * kRadToDeg;
    const double a2 = 360 * u(rng), d2 = std::asin(2 * u(rng) - 1) * kRadToDeg;
    const double ref = eraSeps(a1 * kDegToRad, d1 * kDegToRad, a2 * kDegToRad, d2 * kDegToRad);
    EXPECT_NEAR(separation_deg(a1, d1, a2, d2) * kDegToRad, ref, 1e-14);
    double pa_ref = eraPas(a1 * kDegToRad, d1 * kDegToRad, a2 * kDegToRad, d2 * kDegToRad) * kRadToDeg;
    if (pa_ref < 0) pa_ref += 360.0;
    double diff = std::remainder(position_angle_deg(a1, d1, a2, d2) - pa_ref, 360.0);
    EXPECT_NEAR(diff, 0.0, 1e-9);
  }
}

// Source: ERFA eraTpxes / eraTpsts (gnomonic projection, IAU SOFA).
TEST(Gnomonic, AgreesWithErfa) {
  std::mt19937_64 rng(11);
  std::uniform_real_distribution<double> u(-1.0, 1.0);
  for (int i = 0; i < 500; ++i) {
    const double a0 = 180 + 179 * u(rng), d0 = 89.5 * u(rng);
    const double a = a0 + 2 * u(rng), d = std::clamp(d0 + 2 * u(rng), -89.9, 89.9);
    double xi, eta, xr, er;
    ASSERT_TRUE(gnomonic_offset(a0, d0, a, d, xi, eta));
    ASSERT_EQ(eraTpxes(a * kDegToRad, d * kDegToRad, a0 * kDegToRad, d0 * kDegToRad, &xr, &er), 0);
    EXPECT_NEAR(xi, xr, 1e-14);
    EXPECT_NEAR(eta, er, 1e-14);
    double ra, dec, rr, dr;
    gnomonic_inverse(a0, d0, xi, eta, ra, dec);
    eraTpsts(xi, eta, a0 * kDegToRad, d0 * kDegToRad, &rr, &dr);
    EXPECT_NEAR(std::remainder(ra - rr * kRadToDeg, 360.0), 0.0, 1e-10);
    EXPECT_NEAR(dec, dr * kRadToDeg, 1e-10);
  }
}
