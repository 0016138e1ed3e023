// Island cut-outs for the fitter: (image - background), rms and pixel codes.
#include <Eigen/Eigenvalues>
#include <algorithm>
#include <cmath>

#include "skerry/fitting.h"

namespace skerry {

IslandCutout cut_out_island(const ImageF& image, const NoiseMaps& maps, const LabelsI32& labels,
                            const Island& island, const Eigen::Matrix2d& beam_cov_pix,
                            double margin_beam_sigma, MaskU8* in_island, double* mean_rms) {
  const long nx = image.cols(), ny = image.rows();
  // Margin: free pixels within margin_beam_sigma beam sigmas (major axis), plus one.
  Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> es(beam_cov_pix);
  const long m = 1 + static_cast<long>(std::ceil(margin_beam_sigma * std::sqrt(es.eigenvalues()(1))));
  const long x0 = std::max(0L, static_cast<long>(island.x_min) - m);
  const long x1 = std::min(nx - 1, static_cast<long>(island.x_max) + m);
  const long y0 = std::max(0L, static_cast<long>(island.y_min) - m);
  const long y1 = std::min(ny - 1, static_cast<long>(island.y_max) + m);
  IslandCutout c;
  c.island_id = island.label;
  c.x_origin = static_cast<int>(x0);
  c.y_origin = static_cast<int>(y0);
  c.beam_cov_pix = beam_cov_pix;
  const long w = x1 - x0 + 1, h = y1 - y0 + 1;
  c.data.resize(h, w);
  c.rms.resize(h, w);
  c.mask.resize(h, w);
  if (in_island) *in_island = MaskU8::Zero(h, w);
  double rms_sum = 0.0;
  long rms_n = 0;
  for (long y = y0; y <= y1; ++y) {
    for (long x = x0; x <= x1; ++x) {
      const float v = image(y, x);
      const float b = maps.background_at(static_cast<int>(x), static_cast<int>(y));
      const float s = maps.rms_at(static_cast<int>(x), static_cast<int>(y));
      const long r = y - y0, q = x - x0;
      c.data(r, q) = v - b;
      c.rms(r, q) = s;
      const bool usable = std::isfinite(v) && std::isfinite(b) && std::isfinite(s) && s > 0.0f;
      const std::int32_t lab = labels(y, x);
      if (lab == island.label) {
        c.mask(r, q) = usable ? kCutoutIsland : kCutoutExcluded;
        if (usable) {
          if (in_island) (*in_island)(r, q) = 1;
          rms_sum += s;
          ++rms_n;
        }
      } else {
        c.mask(r, q) = (usable && lab == 0) ? kCutoutFree : kCutoutExcluded;
      }
    }
  }
  if (mean_rms) *mean_rms = rms_n ? rms_sum / static_cast<double>(rms_n) : NAN;
  return c;
}

IslandAperture island_aperture(const ImageF& image, const NoiseMaps& maps, const LabelsI32& labels,
                               const Island& island, int margin_pix,
                               const std::vector<PixelComponent>& components) {
  const long nx = image.cols(), ny = image.rows();
  const long m = std::max(0, margin_pix);
  const long x0 = std::max(0L, static_cast<long>(island.x_min) - m);
  const long x1 = std::min(nx - 1, static_cast<long>(island.x_max) + m);
  const long y0 = std::max(0L, static_cast<long>(island.y_min) - m);
  const long y1 = std::min(ny - 1, static_cast<long>(island.y_max) + m);
  const long w = x1 - x0 + 1, h = y1 - y0 + 1;
  IslandAperture a;
  a.x_origin = static_cast<int>(x0);
  a.y_origin = static_cast<int>(y0);
  a.mask = MaskU8::Zero(h, w);
  a.rms.setConstant(h, w, NAN);
  // Disc offsets of the dilation.
  std::vector<std::pair<int, int>> disc;
  for (long dy = -m; dy <= m; ++dy)
    for (long dx = -m; dx <= m; ++dx)
      if (dx * dx + dy * dy <= m * m) disc.emplace_back(static_cast<int>(dx), static_cast<int>(dy));
  for (long y = island.y_min; y <= island.y_max; ++y)
    for (long x = island.x_min; x <= island.x_max; ++x) {
      if (labels(y, x) != island.label) continue;
      // Only pixels on the island's boundary (or every pixel without a margin)
      // spread the disc.
      bool edge = m == 0;
      for (int dy = -1; dy <= 1 && !edge; ++dy)
        for (int dx = -1; dx <= 1 && !edge; ++dx) {
          const long qx = x + dx, qy = y + dy;
          edge = qx < 0 || qy < 0 || qx >= nx || qy >= ny || labels(qy, qx) != island.label;
        }
      a.mask(y - y0, x - x0) = 1;
      if (!edge) continue;
      for (const auto& [dx, dy] : disc) {
        const long qx = x + dx, qy = y + dy;
        if (qx < x0 || qy < y0 || qx > x1 || qy > y1) continue;
        const std::int32_t lab = labels(qy, qx);
        if (lab == 0) a.mask(qy - y0, qx - x0) = 1;
      }
    }
  for (long r = 0; r < h; ++r)
    for (long q = 0; q < w; ++q) {
      if (!a.mask(r, q)) continue;
      const int x = static_cast<int>(q + x0), y = static_cast<int>(r + y0);
      const float v = image(y, x), b = maps.background_at(x, y), s = maps.rms_at(x, y);
      if (!(std::isfinite(v) && std::isfinite(b) && std::isfinite(s) && s > 0.0f)) {
        a.mask(r, q) = 0;
        continue;
      }
      a.rms(r, q) = s;
      ++a.n_pixels;
      a.data_sum += static_cast<double>(v) - static_cast<double>(b);
      for (const PixelComponent& c : components) a.model_sum += component_value(c, x, y);
    }
  return a;
}

}  // namespace skerry
