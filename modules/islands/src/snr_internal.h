#pragma once
// Internal: the one place where a row of signal-to-noise values is computed,
// shared by the thresholds and the FDR so that both see identical numbers.
#include <cmath>
#include <limits>
#include <vector>

#include "skerry/background.h"
#include "skerry/image.h"

namespace skerry::detail {

/// snr[x] = (I - B) / rms in float (island SNR, docs/CONVENTIONS.md "Signal-to-noise").
/// NaN where I, B or rms is not finite or rms <= 0 (blank). bg and rms receive
/// the maps' row y (the image width each); I - B is recomputed from them where
/// needed with the same float subtraction.
inline void snr_row(const ImageF& image, const NoiseMaps& maps, int y, float* bg, float* rms, float* snr) {
  maps.row(y, bg, rms);
  const int w = static_cast<int>(image.cols());
  const float* p = &image(y, 0);
  const float nan = std::numeric_limits<float>::quiet_NaN();
  const float inf = std::numeric_limits<float>::infinity();
  for (int x = 0; x < w; ++x) {
    const float q = (p[x] - bg[x]) / rms[x];  // NaN image or background propagates
    snr[x] = (rms[x] > 0.0f && rms[x] < inf) ? q : nan;
  }
}

/// First x >= x0 with snr[x] >= t (w when none). Skips 16 pixels at a time with
/// a branch-free test the compiler vectorises (most pixels are below t).
inline int next_at_or_above(const float* snr, int x0, int w, float t) {
  int x = x0;
  while (x < w && (x & 15)) {
    if (snr[x] >= t) return x;
    ++x;
  }
  for (; x + 16 <= w; x += 16) {
    int any = 0;
    for (int k = 0; k < 16; ++k) any |= snr[x + k] >= t ? 1 : 0;
    if (any) break;
  }
  for (; x < w; ++x)
    if (snr[x] >= t) return x;
  return w;
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
  std::vector<float> bg, rms, snr;
  void resize(int w) {
    bg.resize(w);
    rms.resize(w);
    snr.resize(w);
  }
};

}  // namespace skerry::detail
