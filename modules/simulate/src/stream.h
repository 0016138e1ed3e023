#pragma once
/// Counter-based random streams (internal to the simulator).
///
/// A stream is keyed by (seed, purpose, index) and then walks a counter through
/// the SplitMix64 output function (Steele, Lea & Flood 2014, "Fast splittable
/// pseudorandom number generators", OOPSLA; the finaliser constants are those of
/// that paper's reference code, from memory). Keys are hashed with the same
/// finaliser, so streams of neighbouring indices are unrelated. The result does
/// not depend on which thread draws a stream, only on its key.
/// Normal deviates by Marsaglia's polar form of the Box-Muller transform (Marsaglia
/// & Bray 1964, SIAM Review 6, 260; Box & Muller 1958, Ann. Math. Stat. 29, 610),
/// written here so that the numbers do not depend on the standard library's
/// distribution implementations.
#include <cmath>
#include <cstdint>

#include "skerry/constants.h"

namespace skerry::sim::detail {

inline std::uint64_t mix64(std::uint64_t z) {
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
  return z ^ (z >> 31);
}

/// Purposes of streams (part of the key; never renumber).
enum Purpose : std::uint64_t {
  kPurposePosition = 1,
  kPurposeAttributes = 2,
  kPurposeNoise = 3,
  kPurposeBackground = 4,
  kPurposeCounterpart = 5,
  kPurposeOpticalBackground = 6,
  kPurposeRadioField = 7,
};

class Stream {
 public:
  Stream(std::uint64_t seed, std::uint64_t purpose, std::uint64_t index,
         std::uint64_t sub = 0) {
    std::uint64_t k = mix64(seed ^ 0x5ca1ab1e0ddba11ULL);
    k = mix64(k ^ (purpose * 0x9e3779b97f4a7c15ULL));
    k = mix64(k ^ (sub * 0xc2b2ae3d27d4eb4fULL + 0x165667b19e3779f9ULL));
    state_ = mix64(k ^ (index * 0xd6e8feb86659fd93ULL));
  }
  std::uint64_t next() {
    state_ += 0x9e3779b97f4a7c15ULL;
    return mix64(state_);
  }
  /// Uniform in [0, 1) with 53 random bits.
  double uniform() { return static_cast<double>(next() >> 11) * 0x1.0p-53; }
  /// Uniform in (0, 1].
  double uniform_open0() { return static_cast<double>((next() >> 11) + 1) * 0x1.0p-53; }
  /// Two independent standard normal deviates (polar method: (u, v) uniform in
  /// the unit disc, s = u^2 + v^2, then u, v times sqrt(-2 ln s / s)).
  void normal_pair(double& g1, double& g2) {
    for (;;) {
      const double u = 2.0 * uniform() - 1.0, v = 2.0 * uniform() - 1.0;
      const double s = u * u + v * v;
      if (s >= 1.0 || s == 0.0) continue;
      const double f = std::sqrt(-2.0 * std::log(s) / s);
      g1 = u * f;
      g2 = v * f;
      return;
    }
  }
  double normal() {
    double a, b;
    normal_pair(a, b);
    return a;
  }

 private:
  std::uint64_t state_ = 0;
};

}  // namespace skerry::sim::detail
