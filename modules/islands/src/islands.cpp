// Hysteresis island finding with per-island statistics.
#include <tbb/enumerable_thread_specific.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <sstream>
#include <stdexcept>
#include <string>

#include "ccl_internal.h"
#include "skerry/islands.h"
#include "snr_internal.h"

namespace skerry {

namespace {
std::string fmt(double v) {
  std::ostringstream os;
  os << v;
  return os.str();
}
}  // namespace

std::string IslandOptions::validate() const {
  if (peak_threshold == PeakThreshold::fixed) {
    if (!(std::isfinite(peak_snr) && peak_snr > 0.0))
      return "peak_snr = " + fmt(peak_snr) + " breaks 0 < peak_snr < infinity";
    if (!(grow_snr <= peak_snr)) return "grow_snr = " + fmt(grow_snr) + " breaks grow_snr <= peak_snr (" + fmt(peak_snr) + ")";
  } else {
    if (!(fdr_alpha > 0.0 && fdr_alpha < 1.0)) return "fdr_alpha = " + fmt(fdr_alpha) + " breaks 0 < fdr_alpha < 1";
  }
  // A growth threshold at or below zero would join every pixel above the mean
  // into islands: refused rather than run for hours on one island.
  if (!(std::isfinite(grow_snr) && grow_snr > 0.0))
    return "grow_snr = " + fmt(grow_snr) + " breaks 0 < grow_snr < infinity";
  if (min_pixels < 1) return "min_pixels = " + fmt(static_cast<double>(min_pixels)) + " breaks min_pixels >= 1";
  if (strip_rows < 1) return "strip_rows = " + fmt(strip_rows) + " breaks strip_rows >= 1";
  return {};
}

IslandResult find_islands(const ImageF& image, const NoiseMaps& maps, const IslandOptions& options) {
  if (const std::string e = options.validate(); !e.empty()) throw std::invalid_argument("islands: " + e);
  const int w = static_cast<int>(image.cols()), h = static_cast<int>(image.rows());
  if (maps.empty() || maps.width() != w || maps.height() != h)
    throw std::invalid_argument("islands: background/rms maps missing or of a different size than the image");
  IslandResult res;
  if (w == 0 || h == 0) {
    res.labels.resize(h, w);
    res.peak_snr_used = options.peak_threshold == PeakThreshold::fdr ? std::numeric_limits<double>::infinity()
                                                                      : options.peak_snr;
    res.grow_snr_used = std::min(options.grow_snr, res.peak_snr_used);
    return res;
  }
  if (options.peak_threshold == PeakThreshold::fdr) {
    FdrResult fr;
    res.peak_snr_used = fdr_threshold(image, maps, options.fdr_alpha, options.fdr_arbitrary_dependence, &fr);
    res.fdr_tests = fr.tests;
    res.fdr_rejections = fr.rejections;
  } else {
    res.peak_snr_used = options.peak_snr;
  }
  res.grow_snr_used = std::min(options.grow_snr, res.peak_snr_used);
  const float peak_f = detail::float_threshold(res.peak_snr_used);
  const float grow_f = detail::float_threshold(res.grow_snr_used);

  tbb::enumerable_thread_specific<detail::RowBuffers> buffers;
  auto scan = [&](int y, std::vector<detail::Run>& out) {
    detail::RowBuffers& b = buffers.local();
    b.resize(w);
    detail::snr_row(image, maps, y, b.bg.data(), b.rms.data(), b.snr.data());
    const float* s = b.snr.data();
    const float* bgr = b.bg.data();
    const float* img = &image(y, 0);
    int x = 0;
    for (;;) {
      x = detail::next_at_or_above(s, x, w, grow_f);
      if (x >= w) break;
      detail::Run r;
      r.y = y;
      r.x0 = x;
      r.peak_snr = s[x];
      r.peak_x = x;
      while (x < w && s[x] >= grow_f) {
        if (s[x] > r.peak_snr) {
          r.peak_snr = s[x];
          r.peak_x = x;
        }
        r.sum += img[x] - bgr[x];
        ++x;
      }
      r.x1 = x - 1;
      r.seed = r.peak_snr >= peak_f;
      r.edge = y == 0 || y == h - 1 || r.x0 == 0 || r.x1 == w - 1;
      // 8-neighbours that are blank (NaN image value) in rows y-1, y, y+1.
      const int a = std::max(0, r.x0 - 1), e = std::min(w - 1, r.x1 + 1);
      bool blank = !std::isfinite(image(y, a)) || !std::isfinite(image(y, e));
      for (int yy = y - 1; yy <= y + 1 && !blank; yy += 2) {
        if (yy < 0 || yy >= h) continue;
        const float* row = &image(yy, 0);
        for (int xx = a; xx <= e; ++xx)
          if (!std::isfinite(row[xx])) {
            blank = true;
            break;
          }
      }
      r.blank = blank;
      out.push_back(r);
    }
  };
  const detail::Components c = detail::label_components(w, h, options.strip_rows, options.min_pixels, scan);
  res.islands_too_small = c.dropped_small;
  res.islands.resize(static_cast<std::size_t>(c.count));
  // Statistics, accumulated over runs in raster order (deterministic sums;
  // the first maximum in raster order wins ties).
  for (std::size_t i = 0; i < c.runs.size(); ++i) {
    const std::int32_t l = c.label[i];
    if (l == 0) continue;
    const detail::Run& r = c.runs[i];
    Island& isl = res.islands[static_cast<std::size_t>(l - 1)];
    if (isl.pixels == 0) {
      isl.label = l;
      isl.first_x = r.x0;
      isl.first_y = r.y;
      isl.x_min = r.x0;
      isl.x_max = r.x1;
      isl.y_min = isl.y_max = r.y;
      isl.peak_snr = r.peak_snr;
      isl.peak_x = r.peak_x;
      isl.peak_y = r.y;
    } else {
      isl.x_min = std::min(isl.x_min, r.x0);
      isl.x_max = std::max(isl.x_max, r.x1);
      isl.y_max = std::max(isl.y_max, r.y);
      if (r.peak_snr > isl.peak_snr) {
        isl.peak_snr = r.peak_snr;
        isl.peak_x = r.peak_x;
        isl.peak_y = r.y;
      }
    }
    isl.pixels += r.x1 - r.x0 + 1;
    isl.sum_minus_background += r.sum;
    isl.touches_edge = isl.touches_edge || r.edge;
    isl.touches_blank = isl.touches_blank || r.blank;
  }
  for (Island& isl : res.islands) {
    isl.peak_value = image(isl.peak_y, isl.peak_x);
    isl.peak_background = maps.background_at(isl.peak_x, isl.peak_y);
    isl.peak_rms = maps.rms_at(isl.peak_x, isl.peak_y);
  }
  detail::paint_labels(c, w, h, options.strip_rows, res.labels);
  return res;
}

}  // namespace skerry
