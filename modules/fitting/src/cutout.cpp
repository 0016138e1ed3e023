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

}  // namespace skerry
