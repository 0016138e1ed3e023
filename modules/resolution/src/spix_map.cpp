// Robust rms and the per-pixel spectral index map (resolution.h).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cmath>
#include <stdexcept>
#include <vector>

#include "skerry/resolution.h"

namespace skerry {

double robust_rms(const ImageF& image) {
  // At most ~4 million pixels are used, taken at a fixed regular stride
  // (deterministic), which keeps the MAD's relative error below 1e-3.
  const long n = image.size();
  const long stride = std::max(1L, n / 4000000);
  std::vector<float> v;
  v.reserve(static_cast<size_t>(n / stride + 1));
  for (long i = 0; i < n; i += stride) {
    const float p = image.data()[i];
    if (std::isfinite(p)) v.push_back(p);
  }
  if (v.empty()) return NAN;
  auto median = [](std::vector<float>& a) {
    const size_t h = a.size() / 2;
    std::nth_element(a.begin(), a.begin() + static_cast<long>(h), a.end());
    double m = a[h];
    if (a.size() % 2 == 0) m = 0.5 * (m + *std::max_element(a.begin(), a.begin() + static_cast<long>(h)));
    return m;
  };
  double sigma = NAN, med = 0.0;
  std::vector<float> cur = v, dev;
  for (int pass = 0; pass < 10; ++pass) {
    if (cur.empty()) break;
    std::vector<float> tmp = cur;
    med = median(tmp);
    dev.resize(cur.size());
    for (size_t i = 0; i < cur.size(); ++i) dev[i] = static_cast<float>(std::abs(cur[i] - med));
    // 1.4826 MAD = sigma for a normal distribution (common practice).
    const double s = 1.4826 * median(dev);
    if (pass > 0 && std::abs(s - sigma) <= 1e-6 * s) {
      sigma = s;
      break;
    }
    sigma = s;
    std::vector<float> next;
    next.reserve(v.size());
    for (float p : v)
      if (std::abs(p - med) <= 3.0 * sigma) next.push_back(p);
    if (next.size() == cur.size()) break;
    cur.swap(next);
  }
  // The 3-sigma clip removes 0.27 % of a normal distribution's tails; the MAD of
  // the clipped sample is biased low by < 0.1 % (ignored).
  return sigma;
}

SpixMapResult spectral_index_map(const std::vector<const ImageF*>& images,
                                 const std::vector<const ImageF*>& rms_maps,
                                 const std::vector<double>& rms_scalar,
                                 const std::vector<double>& freq_hz,
                                 const std::vector<double>& flux_scale_frac,
                                 const SpixMapOptions& opt) {
  const size_t nb = images.size();
  if (nb < 2) throw std::invalid_argument("spectral index map: needs at least two bands");
  if (freq_hz.size() != nb || rms_scalar.size() != nb || flux_scale_frac.size() != nb ||
      rms_maps.size() != nb)
    throw std::invalid_argument("spectral index map: per-band lists differ in length");
  const long ny = images[0]->rows(), nx = images[0]->cols();
  for (size_t b = 0; b < nb; ++b) {
    if (images[b]->rows() != ny || images[b]->cols() != nx)
      throw std::invalid_argument("spectral index map: images differ in shape");
    if (rms_maps[b] && rms_maps[b]->size() > 0 &&
        (rms_maps[b]->rows() != ny || rms_maps[b]->cols() != nx))
      throw std::invalid_argument("spectral index map: rms map differs in shape");
    if (!(freq_hz[b] > 0.0)) throw std::invalid_argument("spectral index map: frequency <= 0");
  }
  SpixMapResult res;
  res.alpha = ImageF::Constant(ny, nx, NAN);
  res.alpha_err = ImageF::Constant(ny, nx, NAN);
  std::vector<double> lnu(nb);
  for (size_t b = 0; b < nb; ++b) lnu[b] = std::log(freq_hz[b]);
  std::vector<long> count(static_cast<size_t>(ny), 0);
  tbb::parallel_for(tbb::blocked_range<long>(0, ny, 8), [&](const tbb::blocked_range<long>& r) {
    std::vector<double> w(nb), yv(nb);
    for (long y = r.begin(); y != r.end(); ++y)
      for (long x = 0; x < nx; ++x) {
        bool ok = true;
        double sw = 0.0, swx = 0.0, swy = 0.0;
        for (size_t b = 0; b < nb && ok; ++b) {
          const double s = (*images[b])(y, x);
          const double rms = (rms_maps[b] && rms_maps[b]->size() > 0) ? (*rms_maps[b])(y, x)
                                                                      : rms_scalar[b];
          if (!std::isfinite(s) || !(rms > 0.0) || !(s >= opt.min_snr * rms)) {
            ok = false;
            break;
          }
          const double sig = std::hypot(rms, flux_scale_frac[b] * s);
          w[b] = (s / sig) * (s / sig);  // 1 / sigma^2(ln S), first order
          yv[b] = std::log(s);
          sw += w[b];
          swx += w[b] * lnu[b];
          swy += w[b] * yv[b];
        }
        if (!ok) continue;
        // Weighted least squares in log space (REF-SPIX-02).
        const double xm = swx / sw, ym = swy / sw;
        double sxx = 0.0, sxy = 0.0;
        for (size_t b = 0; b < nb; ++b) {
          sxx += w[b] * (lnu[b] - xm) * (lnu[b] - xm);
          sxy += w[b] * (lnu[b] - xm) * (yv[b] - ym);
        }
        if (!(sxx > 0.0)) continue;
        res.alpha(y, x) = static_cast<float>(sxy / sxx);
        res.alpha_err(y, x) = static_cast<float>(1.0 / std::sqrt(sxx));
        ++count[static_cast<size_t>(y)];
      }
  });
  for (long c : count) res.n_pixels += c;
  return res;
}

}  // namespace skerry
