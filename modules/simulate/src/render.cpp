// Beam-convolved elliptical Gaussians, point-sampled at pixel centres.
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <Eigen/LU>
#include <cmath>
#include <limits>
#include <stdexcept>

#include "render_internal.h"
#include "skerry/constants.h"
#include "skerry/simulate.h"

namespace skerry::sim {
namespace detail {

void prepare(const SkySource& s, const PixelSky& sky, long nx, long ny, const RenderOptions& o,
             bool located, double x, double y, double factor, BandSource& out, Footprint& fp) {
  out = BandSource{};
  out.id = s.id;
  out.flags = s.flags;
  out.s_true_jy = s.spectrum.flux_at(o.freq_hz);
  out.pb = factor;
  out.s_int_jy = out.s_true_jy * factor;
  out.local_rms_jy_per_beam = std::numeric_limits<double>::quiet_NaN();
  out.x = located ? x : std::numeric_limits<double>::quiet_NaN();
  out.y = located ? y : std::numeric_limits<double>::quiet_NaN();
  fp = Footprint{};

  // Convolved shape on the sky: covariances add (Wild 1970; gaussian.h).
  const Eigen::Matrix2d c_beam = ellipse_to_cov(to_ellipse(o.beam));
  const Eigen::Matrix2d c_int =
      s.intrinsic.maj > 0.0 ? ellipse_to_cov(s.intrinsic) : Eigen::Matrix2d::Zero();
  const Eigen::Matrix2d c_sky = c_beam + c_int;
  out.convolved = cov_to_ellipse(c_sky);
  // Peak brightness from S_int = A (cmaj cmin) / (bmaj bmin) (REF-SINT-01), with
  // cmaj cmin = 8 ln 2 sqrt(det C) so that rounding in the axes does not enter.
  const double cc = 8.0 * kLn2 * std::sqrt(c_sky.determinant());
  out.peak_jy_per_beam = out.s_int_jy * (o.beam.maj_arcsec * o.beam.min_arcsec) / cc;

  if (!located || !(x >= -0.5 && x < nx - 0.5 && y >= -0.5 && y < ny - 0.5))
    out.flags |= kSimOutsideImage;
  if (!located) return;
  const auto geom = local_geometry(sky, x, y);
  if (!geom) {
    out.flags |= kSimOutsideImage;
    return;
  }
  const Eigen::Matrix2d c_pix = geom->sky_cov_to_pixel(c_sky);
  const Eigen::Matrix2d a = c_pix.inverse();
  fp.x = x;
  fp.y = y;
  fp.a00 = a(0, 0);
  fp.a01 = 0.5 * (a(0, 1) + a(1, 0));
  fp.a11 = a(1, 1);
  fp.peak = out.peak_jy_per_beam;
  fp.k2 = o.cutoff_sigma * o.cutoff_sigma;
  // Extent of the ellipse d^T C^-1 d <= k^2 along x and y: k sqrt(C_xx), k sqrt(C_yy).
  const double hx = o.cutoff_sigma * std::sqrt(c_pix(0, 0));
  const double hy = o.cutoff_sigma * std::sqrt(c_pix(1, 1));
  const double fx0 = std::ceil(x - hx), fx1 = std::floor(x + hx);
  const double fy0 = std::ceil(y - hy), fy1 = std::floor(y + hy);
  fp.clipped = fx0 < 0.0 || fy0 < 0.0 || fx1 > nx - 1.0 || fy1 > ny - 1.0;
  if (fx1 < 0.0 || fy1 < 0.0 || fx0 > nx - 1.0 || fy0 > ny - 1.0) return;  // wholly off grid
  fp.y0 = static_cast<long>(std::max(0.0, fy0));
  fp.y1 = static_cast<long>(std::min(ny - 1.0, fy1));
  fp.draw = true;
  if (fp.clipped) out.flags |= kSimNearEdge;
}

template <class T>
void render(Eigen::Array<T, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>& img,
            const std::vector<Footprint>& fps) {
  const long ny = img.rows(), nx = img.cols();
  constexpr long kStrip = 32;
  const long nstrips = (ny + kStrip - 1) / kStrip;
  std::vector<std::vector<std::size_t>> strips(static_cast<std::size_t>(nstrips));
  for (std::size_t i = 0; i < fps.size(); ++i) {
    if (!fps[i].draw) continue;
    for (long s = fps[i].y0 / kStrip; s <= fps[i].y1 / kStrip; ++s)
      strips[static_cast<std::size_t>(s)].push_back(i);
  }
  tbb::parallel_for(tbb::blocked_range<long>(0, nstrips), [&](const tbb::blocked_range<long>& r) {
    for (long s = r.begin(); s != r.end(); ++s) {
      const long r0 = s * kStrip, r1 = std::min(ny, r0 + kStrip) - 1;
      for (std::size_t i : strips[static_cast<std::size_t>(s)]) {
        const Footprint& f = fps[i];
        for (long row = std::max(r0, f.y0); row <= std::min(r1, f.y1); ++row) {
          long lo, hi;
          row_span(f, nx, row, lo, hi);
          const double dy = static_cast<double>(row) - f.y;
          T* dst = img.data() + static_cast<std::size_t>(row) * nx;
          for (long x = lo; x <= hi; ++x) {
            const double dx = static_cast<double>(x) - f.x;
            const double q = f.a00 * dx * dx + 2.0 * f.a01 * dx * dy + f.a11 * dy * dy;
            dst[x] += static_cast<T>(f.peak * std::exp(-0.5 * q));
          }
        }
      }
    }
  });
}

template void render<float>(ImageF&, const std::vector<Footprint>&);
template void render<double>(ImageD&, const std::vector<Footprint>&);

}  // namespace detail

namespace {

void check_render_options(const RenderOptions& o) {
  if (!o.beam.valid())
    throw std::invalid_argument("add_sources: the beam (" + std::to_string(o.beam.maj_arcsec) +
                                " x " + std::to_string(o.beam.min_arcsec) +
                                " arcsec) is not a valid beam");
  if (!(o.freq_hz > 0.0)) throw std::invalid_argument("add_sources: freq_hz must be > 0");
  if (!(o.cutoff_sigma > 0.0)) throw std::invalid_argument("add_sources: cutoff_sigma must be > 0");
}

template <class T>
std::vector<BandSource> add_sources_impl(
    Eigen::Array<T, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>& image, const PixelSky& sky,
    const std::vector<SkySource>& sources, const RenderOptions& o) {
  check_render_options(o);
  const long ny = image.rows(), nx = image.cols();
  if (o.attenuation && (o.attenuation->rows() != ny || o.attenuation->cols() != nx))
    throw std::invalid_argument("add_sources: the attenuation image differs in shape from the image");
  std::vector<BandSource> truth(sources.size());
  std::vector<detail::Footprint> fps(sources.size());
  tbb::parallel_for(std::size_t{0}, sources.size(), [&](std::size_t i) {
    double x = 0, y = 0;
    const bool located = sky.sky_to_pix(sources[i].ra_deg, sources[i].dec_deg, x, y) &&
                         std::isfinite(x) && std::isfinite(y);
    double factor = 1.0;
    if (located && o.attenuation) {
      const long ix = std::lround(x), iy = std::lround(y);
      if (ix >= 0 && iy >= 0 && ix < nx && iy < ny) {
        const float a = (*o.attenuation)(iy, ix);
        if (std::isfinite(a)) factor = a;
      }
    }
    detail::prepare(sources[i], sky, nx, ny, o, located, x, y, factor, truth[i], fps[i]);
    if (detail::touches(fps[i], nx, [&](long px, long py) { return std::isnan(image(py, px)); }))
      truth[i].flags |= kSimNearEdge;
    if (fps[i].draw) {
      const long ix = std::lround(x), iy = std::lround(y);
      if (ix >= 0 && iy >= 0 && ix < nx && iy < ny && std::isnan(image(iy, ix)))
        truth[i].flags |= kSimOnBlank;
    }
  });
  detail::render(image, fps);
  return truth;
}

}  // namespace

std::vector<BandSource> add_sources(ImageF& image, const PixelSky& sky,
                                    const std::vector<SkySource>& sources,
                                    const RenderOptions& options) {
  return add_sources_impl(image, sky, sources, options);
}

std::vector<BandSource> add_sources(ImageD& image, const PixelSky& sky,
                                    const std::vector<SkySource>& sources,
                                    const RenderOptions& options) {
  return add_sources_impl(image, sky, sources, options);
}

}  // namespace skerry::sim
