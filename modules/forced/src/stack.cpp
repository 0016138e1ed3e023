// Forced values at given positions and a median stack there (forced.h).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <Eigen/Dense>
#include <algorithm>
#include <cmath>
#include <stdexcept>

#include "forced_core.h"
#include "skerry/constants.h"

namespace skerry {

namespace {

double median_of(std::vector<double>& v) {
  if (v.empty()) return NAN;
  const std::size_t h = v.size() / 2;
  std::nth_element(v.begin(), v.begin() + static_cast<long>(h), v.end());
  double m = v[h];
  if (v.size() % 2 == 0) m = 0.5 * (m + *std::max_element(v.begin(), v.begin() + static_cast<long>(h)));
  return m;
}

}  // namespace

StackResult forced_at_positions(const ImageF& image, const ImageF& rms, double rms_scalar,
                                const PixelSky& wcs, const Beam& beam,
                                const std::vector<ForcedSource>& positions, const MaskU8& mask,
                                const std::vector<ExclusionCircle>& exclusions,
                                const StackOptions& opt) {
  const long ny = image.rows(), nx = image.cols();
  if (mask.size() > 0 && (mask.rows() != ny || mask.cols() != nx))
    throw std::invalid_argument("stacking: mask and image differ in shape");
  // Combined exclusion mask: the user's mask plus the exclusion circles, each
  // rasterised by great-circle separation (Vincenty, sky.h) over its pixel box.
  MaskU8 excl = mask.size() > 0 ? mask : MaskU8::Zero(ny, nx);
  for (const ExclusionCircle& c : exclusions) {
    double cx, cy;
    if (!wcs.sky_to_pix(c.ra_deg, c.dec_deg, cx, cy)) continue;
    const auto g = local_geometry(wcs, std::clamp(cx, 0.0, nx - 1.0), std::clamp(cy, 0.0, ny - 1.0));
    if (!g) continue;
    const double pix = std::sqrt(g->pixel_area_arcsec2);
    const long r = static_cast<long>(std::ceil(1.5 * c.radius_arcsec / pix)) + 2;
    for (long y = std::max(0L, static_cast<long>(cy) - r); y <= std::min(ny - 1, static_cast<long>(cy) + r); ++y)
      for (long x = std::max(0L, static_cast<long>(cx) - r); x <= std::min(nx - 1, static_cast<long>(cx) + r); ++x) {
        double ra, dec;
        if (wcs.pix_to_sky(x, y, ra, dec) &&
            separation_deg(ra, dec, c.ra_deg, c.dec_deg) * kDegToArcsec <= c.radius_arcsec)
          excl(y, x) = 1;
      }
  }
  StackResult res;
  std::vector<ForcedSource> pts = positions;
  for (ForcedSource& p : pts) p.intrinsic = Ellipse{};  // point sources at the positions
  res.at_positions = detail::forced_measure_masked(image, rms, rms_scalar, wcs, beam, pts, &excl, opt.forced);

  // Stack geometry in the pixel frame of the image centre (the field is assumed
  // small enough that the pixel frame does not rotate across it).
  const auto gc = local_geometry(wcs, 0.5 * (nx - 1), 0.5 * (ny - 1));
  if (!gc) throw std::invalid_argument("stacking: no sky position at the image centre");
  const double pix_arcsec = std::sqrt(gc->pixel_area_arcsec2);
  // 3 FWHMs rounded up; the 1e-6 keeps a whole number of pixels whole when the
  // pixel size from the WCS differs from the header's in the last digits.
  const long H = opt.half_size_pix > 0 ? opt.half_size_pix
                                       : static_cast<long>(std::ceil(3.0 * beam.maj_arcsec / pix_arcsec - 1e-6));
  const long W = 2 * H + 1;
  std::vector<long> use;
  for (std::size_t i = 0; i < pts.size(); ++i) {
    const ForcedMeasurement& m = res.at_positions[i];
    if (m.flags & (kForcedOutside | kForcedMasked)) continue;
    use.push_back(static_cast<long>(i));
  }
  res.n_stacked = static_cast<long>(use.size());
  res.stack = ImageF::Constant(W, W, NAN);
  if (use.empty()) return res;
  // Cut-outs at the exact sub-pixel positions, bilinear interpolation; a sample
  // whose 2x2 neighbours include a blank, masked or outside pixel is NaN.
  std::vector<float> cut(static_cast<std::size_t>(use.size() * W * W), NAN);
  tbb::parallel_for(tbb::blocked_range<std::size_t>(0, use.size(), 64), [&](const tbb::blocked_range<std::size_t>& r) {
    for (std::size_t u = r.begin(); u != r.end(); ++u) {
      const ForcedMeasurement& m = res.at_positions[use[u]];
      float* dst = cut.data() + u * W * W;
      for (long j = 0; j < W; ++j)
        for (long i = 0; i < W; ++i) {
          const double sx = m.x + (i - H), sy = m.y + (j - H);
          const long ix = static_cast<long>(std::floor(sx)), iy = static_cast<long>(std::floor(sy));
          if (ix < 0 || iy < 0 || ix + 1 >= nx || iy + 1 >= ny) continue;
          const double tx = sx - ix, ty = sy - iy;
          double acc = 0.0;
          bool ok = true;
          for (int b = 0; b < 2 && ok; ++b)
            for (int a = 0; a < 2; ++a) {
              const float v = image(iy + b, ix + a);
              if (std::isnan(v) || excl(iy + b, ix + a)) {
                ok = false;
                break;
              }
              acc += (a ? tx : 1 - tx) * (b ? ty : 1 - ty) * v;
            }
          if (ok) dst[j * W + i] = static_cast<float>(acc);
        }
    }
  });
  // Pixel-wise median over the positions (NaNs ignored).
  tbb::parallel_for(tbb::blocked_range<long>(0, W * W, 16), [&](const tbb::blocked_range<long>& r) {
    std::vector<double> col;
    for (long p = r.begin(); p != r.end(); ++p) {
      col.clear();
      for (std::size_t u = 0; u < use.size(); ++u) {
        const float v = cut[u * W * W + p];
        if (!std::isnan(v)) col.push_back(v);
      }
      res.stack.data()[p] = static_cast<float>(median_of(col));
    }
  });
  // Stacked amplitude: weighted least squares of the beam (pixel frame at the
  // centre) over the central pixels, a = sum g I / sum g^2; the stack's rms from
  // the annulus beyond rms_inner_beams FWHMs (1.4826 MAD, common practice); the
  // amplitude error from that rms with the correlated-noise form of forced.h.
  const Eigen::Matrix2d cb = gc->sky_cov_to_pixel(ellipse_to_cov(to_ellipse(beam)));
  const Eigen::Matrix2d ci = cb.inverse();
  const double R2 = opt.forced.fit_radius_sigma * opt.forced.fit_radius_sigma;
  const double inner_pix = opt.rms_inner_beams * beam.maj_arcsec / pix_arcsec;
  double sgi = 0.0, sgg = 0.0;
  std::vector<double> ann;
  for (long j = 0; j < W; ++j)
    for (long i = 0; i < W; ++i) {
      const double v = res.stack(j, i);
      if (std::isnan(v)) continue;
      const double dx = i - H, dy = j - H;
      const double q = ci(0, 0) * dx * dx + 2 * ci(0, 1) * dx * dy + ci(1, 1) * dy * dy;
      if (q <= R2) {
        const double g = std::exp(-0.5 * q);
        sgi += g * v;
        sgg += g * g;
      }
      if (std::hypot(dx, dy) >= inner_pix) ann.push_back(v);
    }
  if (sgg > 0.0) {
    res.stacked_peak_jy_per_beam = sgi / sgg;
    res.stacked_flux_jy = res.stacked_peak_jy_per_beam;  // point source: S = peak
  }
  if (ann.size() >= 8) {
    const double med = median_of(ann);
    std::vector<double> dev;
    for (double v : ann) dev.push_back(std::abs(v - med));
    res.stack_rms_jy_per_beam = 1.4826 * median_of(dev);
    // var(a) = rms^2 * overlap(C, C, Cb, 0) / (sum g^2)^2 (forced.h sandwich form).
    if (sgg > 0.0)
      res.stacked_flux_err_jy = res.stack_rms_jy_per_beam *
                                std::sqrt(detail::correlated_overlap(cb, cb, cb, Eigen::Vector2d::Zero())) / sgg;
  }
  return res;
}

}  // namespace skerry
