// Designations: IAU-recommended style PREFIX JHHMMSS.s+DDMMSS, truncated, never
// rounded (IAU Commission 5 recommendations on designations, common practice;
// docs/CONVENTIONS.md "Catalogues and names"). Sexagesimal conversions of the inputs come
// from ERFA (eraTf2a, eraAf2a: the IAU SOFA routines), not from our own code.
#include <erfa.h>
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <random>

#include "skerry/survey.h"

using skerry::survey::collision_suffix;
using skerry::survey::designation;

namespace {
constexpr double ERFA_DPI_ = 3.141592653589793238462643;
double ra_deg_from_hms(int h, int m, double s) {
  double rad = 0.0;
  EXPECT_EQ(eraTf2a('+', h, m, s, &rad), 0);
  return rad * 180.0 / ERFA_DPI_;
}
double dec_deg_from_dms(char sign, int d, int m, double s) {
  double rad = 0.0;
  EXPECT_EQ(eraAf2a(sign, d, m, s, &rad), 0);
  return rad * 180.0 / ERFA_DPI_;
}
}  // namespace

// The invented field's centre: RA 201.25 deg = 13h25m00s exactly, Dec -38.6 deg =
// -38d36'00" exactly (decimal inputs whose binary forms lie just below the boundary).
TEST(Designation, FieldCentre) {
  EXPECT_EQ(designation("SKDC", 201.25, -38.6), "SKDC J132500.0-383600");
}

// 59.99 s of time truncates to 59.9, not 60.0 (rounding would carry into the minute).
TEST(Designation, SecondsTruncatedAt5999) {
  EXPECT_EQ(designation("SKDC", ra_deg_from_hms(1, 2, 59.99), dec_deg_from_dms('+', 5, 6, 59.99)),
            "SKDC J010259.9+050659");
  EXPECT_EQ(designation("SKDC", ra_deg_from_hms(13, 59, 59.96), dec_deg_from_dms('-', 38, 59, 59.9)),
            "SKDC J135959.9-385959");
}

// Negative Dec with zero degrees keeps its sign: -0d00'00.5" is -000000.
TEST(Designation, NegativeZeroDeclination) {
  EXPECT_EQ(designation("SKDC", 0.0, dec_deg_from_dms('-', 0, 0, 0.5)), "SKDC J000000.0-000000");
  EXPECT_EQ(designation("SKDC", 0.0, dec_deg_from_dms('+', 0, 0, 0.5)), "SKDC J000000.0+000000");
  EXPECT_EQ(designation("SKDC", 0.0, -0.0), "SKDC J000000.0+000000");  // -0.0 is not below zero
  EXPECT_EQ(designation("SKDC", 0.0, -90.0), "SKDC J000000.0-900000");
  EXPECT_EQ(designation("SKDC", 0.0, 90.0), "SKDC J000000.0+900000");
}

// RA just below 24h stays at 23h59m59.9s; 360 deg and negative RA wrap.
TEST(Designation, RightAscensionNear24h) {
  EXPECT_EQ(designation("SKDC", ra_deg_from_hms(23, 59, 59.99), 1.0), "SKDC J235959.9+010000");
  EXPECT_EQ(designation("SKDC", 359.99999, 1.0), "SKDC J235959.9+010000");  // 23h59m59.9976s
  EXPECT_EQ(designation("SKDC", 360.0, 1.0), "SKDC J000000.0+010000");
  EXPECT_EQ(designation("SKDC", -0.00001, 1.0), "SKDC J235959.9+010000");
  EXPECT_EQ(designation("SKDC", 720.0 + 201.25, -38.6), "SKDC J132500.0-383600");
}

TEST(Designation, InvalidPositionsRefused) {
  EXPECT_THROW(designation("SKDC", std::nan(""), 0.0), std::invalid_argument);
  EXPECT_THROW(designation("SKDC", 10.0, 90.5), std::invalid_argument);
  EXPECT_THROW(designation("SKDC", INFINITY, 0.0), std::invalid_argument);
}

// Many random positions against ERFA's own sexagesimal decomposition (eraA2tf,
// eraA2af at 4 decimals, which round): truncating that to our digits gives the
// same result unless the position lies within 1e-4 of a boundary of the last
// digit, where rounding at 4 decimals can cross it; those are skipped.
TEST(Designation, AgreesWithErfaDecomposition) {
  std::mt19937_64 rng(20261201);
  std::uniform_real_distribution<double> ura(0.0, 360.0), usd(-1.0, 1.0);
  int checked = 0;
  for (int i = 0; i < 20000; ++i) {
    const double ra = ura(rng), dec = std::asin(usd(rng)) * 180.0 / ERFA_DPI_;
    const double t = ra * 2400.0, a = std::fabs(dec) * 3600.0;
    if (t - std::floor(t) > 1.0 - 1e-3 || t - std::floor(t) < 1e-3) continue;
    if (a - std::floor(a) > 1.0 - 1e-3 || a - std::floor(a) < 1e-3) continue;
    char s;
    int hmsf[4], dmsf[4];
    eraA2tf(4, ra * ERFA_DPI_ / 180.0, &s, hmsf);
    char sd;
    eraA2af(4, dec * ERFA_DPI_ / 180.0, &sd, dmsf);
    char want[64];
    std::snprintf(want, sizeof want, "SKDC J%02d%02d%02d.%d%c%02d%02d%02d", hmsf[0], hmsf[1], hmsf[2],
                  hmsf[3] / 1000, sd, dmsf[0], dmsf[1], dmsf[2]);
    ASSERT_EQ(designation("SKDC", ra, dec), want) << "ra " << ra << " dec " << dec;
    ++checked;
  }
  EXPECT_GT(checked, 19000);
}

// Bijective base-26 letters (common practice for collision suffixes).
TEST(CollisionSuffix, Letters) {
  EXPECT_EQ(collision_suffix(0), "a");
  EXPECT_EQ(collision_suffix(1), "b");
  EXPECT_EQ(collision_suffix(25), "z");
  EXPECT_EQ(collision_suffix(26), "aa");
  EXPECT_EQ(collision_suffix(27), "ab");
  EXPECT_EQ(collision_suffix(701), "zz");
  EXPECT_EQ(collision_suffix(702), "aaa");
}
