// The combined (matched, inverse-variance weighted) detection image (resolution.h).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <cmath>
#include <stdexcept>
#include <vector>

#include "skerry/resolution.h"

namespace skerry {

DetectionImageResult combined_detection_image(const std::vector<const ImageF*>& images,
                                              const std::vector<const ImageF*>& rms_maps,
                                              const std::vector<double>& rms_scalar,
                                              const std::vector<double>& freq_hz,
                                              const DetectionImageOptions& options) {
  const std::size_t nb = images.size();
  if (nb < 1) throw std::invalid_argument("combined detection image: no bands");
  if (rms_maps.size() != nb || rms_scalar.size() != nb || freq_hz.size() != nb)
    throw std::invalid_argument("combined detection image: one rms and one frequency per band are needed");
  if (!std::isfinite(options.alpha)) throw std::invalid_argument("combined detection image: alpha is not finite");
  const long ny = images[0]->rows(), nx = images[0]->cols();
  double log_ref = 0.0;
  for (std::size_t b = 0; b < nb; ++b) {
    if (!images[b] || images[b]->rows() != ny || images[b]->cols() != nx)
      throw std::invalid_argument("combined detection image: the bands differ in shape");
    if (rms_maps[b] && (rms_maps[b]->rows() != ny || rms_maps[b]->cols() != nx))
      throw std::invalid_argument("combined detection image: an rms map differs in shape");
    if (!rms_maps[b] && !(rms_scalar[b] > 0.0))
      throw std::invalid_argument("combined detection image: no rms map and rms_scalar <= 0");
    if (!(freq_hz[b] > 0.0)) throw std::invalid_argument("combined detection image: frequency <= 0");
    log_ref += std::log(freq_hz[b]) / static_cast<double>(nb);
  }
  // a_b = (nu_b / nu_ref)^alpha; nu_ref (the geometric mean) cancels in D and
  // only keeps the numbers near 1.
  std::vector<double> a(nb);
  for (std::size_t b = 0; b < nb; ++b) a[b] = std::exp(options.alpha * (std::log(freq_hz[b]) - log_ref));

  DetectionImageResult out;
  out.snr = ImageF::Constant(ny, nx, NAN);
  std::vector<long> n_val(static_cast<std::size_t>(ny), 0), n_part(static_cast<std::size_t>(ny), 0);
  tbb::parallel_for(tbb::blocked_range<long>(0, ny, 16), [&](const tbb::blocked_range<long>& r) {
    for (long y = r.begin(); y != r.end(); ++y)
      for (long x = 0; x < nx; ++x) {
        // D = sum a_b I_b / s_b^2 / sqrt(sum a_b^2 / s_b^2) (resolution.h).
        double num = 0.0, den = 0.0;
        std::size_t used = 0;
        for (std::size_t b = 0; b < nb; ++b) {
          const double v = (*images[b])(y, x);
          const double s = rms_maps[b] ? static_cast<double>((*rms_maps[b])(y, x)) : rms_scalar[b];
          if (!std::isfinite(v) || !std::isfinite(s) || !(s > 0.0)) continue;
          num += a[b] * v / (s * s);
          den += a[b] * a[b] / (s * s);
          ++used;
        }
        if (used == 0) continue;
        out.snr(y, x) = static_cast<float>(num / std::sqrt(den));
        ++n_val[static_cast<std::size_t>(y)];
        if (used < nb) ++n_part[static_cast<std::size_t>(y)];
      }
  });
  for (long y = 0; y < ny; ++y) {
    out.n_pixels += n_val[static_cast<std::size_t>(y)];
    out.n_partial += n_part[static_cast<std::size_t>(y)];
  }
  return out;
}

}  // namespace skerry
