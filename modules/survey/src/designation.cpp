// IAU-style source designations from positions, truncated (never rounded).
#include <cmath>
#include <cstdio>
#include <stdexcept>

#include "skerry/survey.h"

namespace skerry::survey {

namespace {
/// Values this close below a unit boundary (in units of the last digit) are
/// taken as on it: absorbs the binary representation error of decimal inputs
/// such as 201.25 deg * 2400 (exact) or 38.6 deg * 3600 (138959.99999999997).
/// 1e-7 of 0.1 s of time is 1.5e-7 arcsec at the equator, far below any
/// measured position error.
constexpr double kBoundarySlack = 1e-7;
}  // namespace

namespace {
struct Parts {
  long long t;   ///< RA in tenths of a second of time, [0, 864000)
  long long a;   ///< |Dec| in whole arcseconds, [0, 324000]
  bool negative; ///< Dec < 0
};
Parts parts_of(double ra_deg, double dec_deg) {
  if (!std::isfinite(ra_deg) || !std::isfinite(dec_deg) || std::fabs(dec_deg) > 90.0)
    throw std::invalid_argument("designation: position (" + std::to_string(ra_deg) + ", " +
                                std::to_string(dec_deg) + ") deg is not a valid sky position");
  double ra = std::fmod(ra_deg, 360.0);
  if (ra < 0.0) ra += 360.0;  // may give exactly 360.0 for tiny negative inputs; wrapped below
  // RA in tenths of a second of time: 24 h = 360 deg = 864000 tenths, so 1 deg = 2400.
  long long t = static_cast<long long>(std::floor(ra * 2400.0 + kBoundarySlack));
  if (t >= 864000) t -= 864000;  // a value that truncates to 24h 00m 00.0s is 0h
  // |Dec| in whole arcseconds, truncated.
  const long long a = static_cast<long long>(std::floor(std::fabs(dec_deg) * 3600.0 + kBoundarySlack));
  return {t, a, dec_deg < 0.0};
}
}  // namespace

std::int64_t designation_key(double ra_deg, double dec_deg) {
  const Parts p = parts_of(ra_deg, dec_deg);
  return (p.t * 2 + (p.negative ? 1 : 0)) * 324001 + p.a;
}

std::string designation(const std::string& prefix, double ra_deg, double dec_deg) {
  const Parts p = parts_of(ra_deg, dec_deg);
  const long long h = p.t / 36000, m = (p.t / 600) % 60, s = (p.t / 10) % 60, ds = p.t % 10;
  const long long d = p.a / 3600, am = (p.a / 60) % 60, as = p.a % 60;
  char buf[96];
  std::snprintf(buf, sizeof buf, " J%02lld%02lld%02lld.%lld%c%02lld%02lld%02lld", h, m, s, ds,
                p.negative ? '-' : '+', d, am, as);
  return prefix + buf;
}

std::string collision_suffix(std::size_t rank) {
  // Bijective base 26: 0 -> a, 25 -> z, 26 -> aa, 27 -> ab, ...
  std::string out;
  std::size_t n = rank + 1;
  while (n > 0) {
    --n;
    out.insert(out.begin(), static_cast<char>('a' + n % 26));
    n /= 26;
  }
  return out;
}

}  // namespace skerry::survey
