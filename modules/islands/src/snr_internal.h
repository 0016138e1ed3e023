#pragma once
// Internal: the one place where a row of signal-to-noise values is computed,
// shared by the thresholds and the FDR so that both see identical numbers.
#include <cmath>
#include <limits>
#include <vector>

#include "skerry/background.h"
#include "skerry/image.h"

namespace skerry::detail {

/// snr[x] = (I - B) / rms in float (island SNR, CONVENTIONS.md "Signal-to-noise");
/// diff[x] = I - B. NaN where I, B or rms is not finite or rms <= 0 (blank).
/// bg and rms are scratch rows of the image width.
inline void snr_row(const ImageF& image, const NoiseMaps& maps, int y, float* bg, float* rms,
                    float* diff, float* snr) {
  maps.row(y, bg, rms);
  const int w = static_cast<int>(image.cols());
  const float* p = &image(y, 0);
  const float nan = std::numeric_limits<float>::quiet_NaN();
  for (int x = 0; x < w; ++x) {
    const float d = p[x] - bg[x];
    diff[x] = d;
    const bool ok = rms[x] > 0.0f && rms[x] < std::numeric_limits<float>::infinity();
    snr[x] = ok ? d / rms[x] : nan;  // NaN image or background propagates
  }
}

/// Smallest float f with (double) f >= t, so that (float s >= f) == ((double) s >= t).
inline float float_threshold(double t) {
  if (std::isnan(t)) return std::numeric_limits<float>::quiet_NaN();
  if (t > std::numeric_limits<float>::max()) return std::numeric_limits<float>::infinity();
  float f = static_cast<float>(t);
  if (static_cast<double>(f) < t) f = std::nextafter(f, std::numeric_limits<float>::infinity());
  return f;
}

struct RowBuffers {
  std::vector<float> bg, rms, diff, snr;
  void resize(int w) {
    bg.resize(w);
    rms.resize(w);
    diff.resize(w);
    snr.resize(w);
  }
};

}  // namespace skerry::detail
