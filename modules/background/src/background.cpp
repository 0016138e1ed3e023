// Background and rms on a grid of boxes, in parallel over boxes (oneTBB).
#include <tbb/blocked_range.h>
#include <tbb/enumerable_thread_specific.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <sstream>
#include <stdexcept>
#include <string>
#include <utility>
#include <vector>

#include "clip_internal.h"
#include "skerry/background.h"
#include "skerry/constants.h"

namespace skerry {

const char* to_string(BackgroundStatus s) {
  switch (s) {
    case BackgroundStatus::ok: return "ok";
    case BackgroundStatus::no_data: return "no_data";
    case BackgroundStatus::zero_rms: return "zero_rms";
  }
  return "unknown";
}

namespace {

std::string fmt(double v) {
  std::ostringstream os;
  os << v;
  return os.str();
}

// Beam FWHM in pixels: given, or from the beam area Omega = (pi / 4 ln 2) FWHM^2
// (REF-GAUSS-03), as the geometric-mean FWHM sqrt(bmaj bmin).
double beam_fwhm_pixels(const BackgroundOptions& o) {
  if (o.beam_fwhm_pix > 0.0) return o.beam_fwhm_pix;
  if (o.beam_area_pix > 0.0) return std::sqrt(o.beam_area_pix / kGaussAreaFactor);
  return 0.0;
}

struct Sizes {
  int box = 0, step = 0;
};

Sizes resolve_sizes(const BackgroundOptions& o) {
  const double fwhm = beam_fwhm_pixels(o);
  Sizes s;
  s.box = o.box_pixels > 0 ? o.box_pixels : static_cast<int>(std::lround(o.box_beams * fwhm));
  if (o.step_pixels > 0) s.step = o.step_pixels;
  else if (o.step_beams > 0.0) s.step = static_cast<int>(std::lround(o.step_beams * fwhm));
  else s.step = s.box;
  return s;
}

// Node centres along one axis of n pixels: m = ceil(n / step) nodes (1 when the
// axis is shorter than a box), evenly spaced at n / m, centre of cell i at
// (i + 0.5) n / m - 0.5. The box of node i starts at floor(c + 0.5 - box / 2),
// shifted to lie inside [0, n).
void axis_nodes(int n, int box, int step, std::vector<double>& centres, std::vector<int>& start,
                std::vector<int>& end) {
  const int m = n <= box ? 1 : std::max(1, (n + step - 1) / step);
  centres.resize(m);
  start.resize(m);
  end.resize(m);
  for (int i = 0; i < m; ++i) {
    const double c = (i + 0.5) * static_cast<double>(n) / m - 0.5;
    centres[i] = c;
    int s0 = static_cast<int>(std::floor(c + 0.5 - 0.5 * box));
    s0 = std::clamp(s0, 0, std::max(0, n - box));
    start[i] = s0;
    end[i] = std::min(n, s0 + box);
  }
}

// Fill nodes where ok == 0 from the mean of their ok 8-neighbours, in rounds
// (Jacobi style: each round reads only nodes that were ok before it, so the
// result does not depend on the visiting order). Returns false when no node is ok.
bool fill_from_neighbours(ImageF& v, std::vector<std::uint8_t>& ok, int nx, int ny) {
  if (std::none_of(ok.begin(), ok.end(), [](std::uint8_t o) { return o != 0; })) return false;
  std::vector<std::uint8_t> next = ok;
  for (;;) {
    bool any_missing = false;
    for (int j = 0; j < ny; ++j)
      for (int i = 0; i < nx; ++i) {
        if (ok[j * nx + i]) continue;
        double sum = 0.0;
        int cnt = 0;
        for (int dj = -1; dj <= 1; ++dj)
          for (int di = -1; di <= 1; ++di) {
            const int jj = j + dj, ii = i + di;
            if (jj < 0 || jj >= ny || ii < 0 || ii >= nx || !ok[jj * nx + ii]) continue;
            sum += v(jj, ii);
            ++cnt;
          }
        if (cnt > 0) {
          v(j, i) = static_cast<float>(sum / cnt);
          next[j * nx + i] = 1;
        } else {
          any_missing = true;
        }
      }
    ok = next;
    if (!any_missing) return true;
  }
}

}  // namespace

std::string BackgroundOptions::validate() const {
  const Sizes s = resolve_sizes(*this);
  if (box_pixels < 0) return "box_pixels = " + fmt(box_pixels) + " breaks box_pixels >= 0 (0 = from box_beams)";
  if (step_pixels < 0) return "step_pixels = " + fmt(step_pixels) + " breaks step_pixels >= 0 (0 = from step_beams)";
  if (box_pixels == 0) {
    if (!(box_beams > 0.0) || !std::isfinite(box_beams))
      return "box_beams = " + fmt(box_beams) + " breaks box_beams > 0";
    if (!(beam_fwhm_pixels(*this) > 0.0) || !std::isfinite(beam_fwhm_pixels(*this)))
      return "box size in beams needs the beam: beam_fwhm_pix or beam_area_pix must be > 0 (or set box_pixels)";
  }
  if (step_pixels == 0 && (step_beams < 0.0 || !std::isfinite(step_beams)))
    return "step_beams = " + fmt(step_beams) + " breaks step_beams >= 0 (0 = the box size)";
  if (s.box < 4) return "box size = " + fmt(s.box) + " pixels breaks box >= 4 pixels";
  if (s.step < 1) return "step size = " + fmt(s.step) + " pixels breaks step >= 1 pixel";
  if (!(clip_sigma >= 2.0) || !std::isfinite(clip_sigma))
    return "clip_sigma = " + fmt(clip_sigma) + " breaks clip_sigma >= 2";
  if (max_clip_iterations < 1)
    return "max_clip_iterations = " + fmt(max_clip_iterations) + " breaks max_clip_iterations >= 1";
  if (!(min_valid_fraction >= 0.0 && min_valid_fraction <= 1.0))
    return "min_valid_fraction = " + fmt(min_valid_fraction) + " breaks 0 <= min_valid_fraction <= 1";
  if (min_valid_pixels < 2) return "min_valid_pixels = " + fmt(min_valid_pixels) + " breaks min_valid_pixels >= 2";
  return {};
}

BackgroundResult estimate_background(const ImageF& image, const BackgroundOptions& options,
                                     const MaskU8* exclude) {
  if (const std::string e = options.validate(); !e.empty()) throw std::invalid_argument("background: " + e);
  if (exclude && (exclude->rows() != image.rows() || exclude->cols() != image.cols()))
    throw std::invalid_argument("background: exclusion mask shape differs from the image");
  const int w = static_cast<int>(image.cols()), h = static_cast<int>(image.rows());
  BackgroundResult res;
  if (w < 1 || h < 1) {
    res.status = BackgroundStatus::no_data;
    res.message = "the image has no pixels";
    return res;
  }
  const Sizes sz = resolve_sizes(options);
  BackgroundGrid g;
  g.image_width = w;
  g.image_height = h;
  g.box_pixels = sz.box;
  g.step_pixels = sz.step;
  std::vector<int> xs, xe, ys, ye;
  axis_nodes(w, sz.box, sz.step, g.node_x, xs, xe);
  axis_nodes(h, sz.box, sz.step, g.node_y, ys, ye);
  const int nx = g.nx(), ny = g.ny();
  g.background.setZero(ny, nx);
  g.rms.setZero(ny, nx);
  g.valid_pixels.setZero(ny, nx);
  g.filled.setZero(ny, nx);
  const double corr = clipped_sigma_correction(options.clip_sigma);

  struct Scratch {
    std::vector<float> values;
    std::vector<std::uint32_t> sort;
  };
  tbb::enumerable_thread_specific<Scratch> scratch;
  std::vector<std::uint8_t> ok(static_cast<std::size_t>(nx) * ny, 0);
  // One task per box: gather finite, unmasked pixels, sort, clip. Each node's
  // value depends only on its own pixels, so the grid is the same for any
  // number of threads.
  tbb::parallel_for(tbb::blocked_range<int>(0, nx * ny, 1), [&](const tbb::blocked_range<int>& r) {
    Scratch& sc = scratch.local();
    for (int n = r.begin(); n < r.end(); ++n) {
      const int j = n / nx, i = n % nx;
      const int x0 = xs[i], x1 = xe[i], y0 = ys[j], y1 = ye[j];
      sc.values.resize(static_cast<std::size_t>(x1 - x0) * (y1 - y0));
      float* out = sc.values.data();
      std::size_t cnt = 0;
      for (int y = y0; y < y1; ++y) {
        const float* p = &image(y, 0);
        if (exclude) {
          const std::uint8_t* mk = &(*exclude)(y, 0);
          for (int x = x0; x < x1; ++x)
            if (std::isfinite(p[x]) && mk[x] == 0) out[cnt++] = p[x];
        } else {
          for (int x = x0; x < x1; ++x)
            if (std::isfinite(p[x])) out[cnt++] = p[x];
        }
      }
      g.valid_pixels(j, i) = static_cast<std::int32_t>(cnt);
      const double area = static_cast<double>(x1 - x0) * (y1 - y0);
      if (static_cast<double>(cnt) < options.min_valid_fraction * area ||
          cnt < static_cast<std::size_t>(options.min_valid_pixels))
        continue;
      detail::sort_floats(out, cnt, sc.sort);
      const ClipResult c =
          detail::clip_sorted(out, static_cast<std::int64_t>(cnt), options.clip_sigma, options.max_clip_iterations, corr);
      g.background(j, i) = static_cast<float>(c.centre);
      g.rms(j, i) = static_cast<float>(c.sigma);
      ok[n] = 1;
    }
  });

  // Nodes without enough data: filled from neighbours (background and rms).
  std::vector<std::uint8_t> ok_rms = ok;
  for (int n = 0; n < nx * ny; ++n)
    if (ok[n] && !(g.rms(n / nx, n % nx) > 0.0f)) {
      ok_rms[n] = 0;
      ++res.boxes_nonpositive_rms;
    }
  std::vector<std::uint8_t> ok_bg = ok;
  if (!fill_from_neighbours(g.background, ok_bg, nx, ny)) {
    res.status = BackgroundStatus::no_data;
    res.message = "no box of " + std::to_string(sz.box) + " x " + std::to_string(sz.box) +
                  " pixels has enough valid pixels (all blank?)";
    return res;
  }
  for (int n = 0; n < nx * ny; ++n)
    if (!ok[n]) {
      g.filled(n / nx, n % nx) = 1;
      ++res.boxes_filled;
    }
  if (!fill_from_neighbours(g.rms, ok_rms, nx, ny)) {
    res.status = BackgroundStatus::zero_rms;
    res.message = "the rms is zero or negative everywhere (constant image?)";
  } else {
    res.status = BackgroundStatus::ok;
  }
  res.maps = NoiseMaps::from_grid(std::move(g));
  return res;
}

MaskU8 grow_mask(const LabelsI32& labels, int margin_pixels) {
  if (margin_pixels < 0) throw std::invalid_argument("grow_mask: margin_pixels must be >= 0");
  const int w = static_cast<int>(labels.cols()), h = static_cast<int>(labels.rows());
  const int r = std::min(margin_pixels, std::max(w, h));  // a larger margin changes nothing
  // Separable square dilation (Chebyshev distance <= r), exact and independent
  // of the partition: along x row by row (each run of labelled pixels widened
  // by r), then along y as the OR of the rows y - r .. y + r, skipping rows
  // without any mask (most of an image).
  MaskU8 hmask(h, w);
  std::vector<std::uint8_t> row_any(static_cast<std::size_t>(h), 0);
  tbb::parallel_for(tbb::blocked_range<int>(0, h, 32), [&](const tbb::blocked_range<int>& rr) {
    for (int y = rr.begin(); y < rr.end(); ++y) {
      const std::int32_t* l = &labels(y, 0);
      std::uint8_t* o = &hmask(y, 0);
      std::fill_n(o, w, std::uint8_t{0});
      int x = 0;
      while (x < w) {
        // Skip 16 zero labels at a time (branch-free test, vectorised).
        if ((x & 15) == 0 && x + 16 <= w) {
          int any = 0;
          for (int k = 0; k < 16; ++k) any |= l[x + k];
          if (any == 0) {
            x += 16;
            continue;
          }
        }
        if (l[x] == 0) {
          ++x;
          continue;
        }
        const int x0 = x;
        while (x < w && l[x] != 0) ++x;
        std::fill(o + std::max(0, x0 - r), o + std::min(w, x - 1 + r + 1), std::uint8_t{1});
        row_any[y] = 1;
      }
    }
  });
  if (r == 0) return hmask;
  MaskU8 m(h, w);
  tbb::parallel_for(tbb::blocked_range<int>(0, h, 32), [&](const tbb::blocked_range<int>& rr) {
    for (int y = rr.begin(); y < rr.end(); ++y) {
      std::uint8_t* o = &m(y, 0);
      bool first = true;
      for (int yy = std::max(0, y - r); yy <= std::min(h - 1, y + r); ++yy) {
        if (!row_any[yy]) continue;
        const std::uint8_t* src = &hmask(yy, 0);
        if (first) {
          std::copy_n(src, w, o);
          first = false;
        } else {
          for (int x = 0; x < w; ++x) o[x] |= src[x];
        }
      }
      if (first) std::fill_n(o, w, std::uint8_t{0});
    }
  });
  return m;
}

namespace {
std::string pixel_problem(const char* what, int x, int y, float v) {
  std::ostringstream os;
  os << what << " at pixel (x, y) = (" << x << ", " << y << ") [0-based] is " << v;
  return os.str();
}
}  // namespace

std::string check_rms_map(const ImageF& image, const ImageF& rms) {
  if (rms.rows() != image.rows() || rms.cols() != image.cols())
    return "rms map is " + std::to_string(rms.cols()) + " x " + std::to_string(rms.rows()) +
           " pixels but the image is " + std::to_string(image.cols()) + " x " + std::to_string(image.rows());
  for (Eigen::Index y = 0; y < image.rows(); ++y)
    for (Eigen::Index x = 0; x < image.cols(); ++x)
      if (std::isfinite(image(y, x)) && !(std::isfinite(rms(y, x)) && rms(y, x) > 0.0f))
        return pixel_problem("rms", static_cast<int>(x), static_cast<int>(y), rms(y, x)) +
               " where the image has data (must be finite and > 0)";
  return {};
}

std::string check_background_map(const ImageF& image, const ImageF& background) {
  if (background.rows() != image.rows() || background.cols() != image.cols())
    return "background map is " + std::to_string(background.cols()) + " x " + std::to_string(background.rows()) +
           " pixels but the image is " + std::to_string(image.cols()) + " x " + std::to_string(image.rows());
  for (Eigen::Index y = 0; y < image.rows(); ++y)
    for (Eigen::Index x = 0; x < image.cols(); ++x)
      if (std::isfinite(image(y, x)) && !std::isfinite(background(y, x)))
        return pixel_problem("background", static_cast<int>(x), static_cast<int>(y), background(y, x)) +
               " where the image has data (must be finite)";
  return {};
}

}  // namespace skerry
