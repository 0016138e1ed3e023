// Convolution of an image with an elliptical Gaussian kernel (resolution.h):
// FFT path with the analytic transfer function, or direct sum, both NaN-aware
// by normalised convolution.
#include <fftw3.h>
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <cmath>
#include <complex>
#include <memory>
#include <mutex>
#include <stdexcept>
#include <vector>

#include "skerry/constants.h"
#include "skerry/fft_lock.h"
#include "skerry/resolution.h"

namespace skerry {

namespace {

// FFTW's planner is not thread-safe (FFTW manual, "Thread safety"); execution is.
// Plans are made and destroyed under the process-wide lock of skerry/fft_lock.h.

struct PlanDeleter {
  void operator()(fftwf_plan_s* p) const {
    std::lock_guard<std::mutex> lock(fftw_planner_mutex());
    fftwf_destroy_plan(p);
  }
};
using Plan = std::unique_ptr<fftwf_plan_s, PlanDeleter>;

// 1-D in-place complex plan of length n, usable on any array (FFTW_UNALIGNED),
// ESTIMATE: no timing measurements, so the same plan (and bits) on every run.
Plan make_plan(int n, int sign) {
  std::lock_guard<std::mutex> lock(fftw_planner_mutex());
  fftwf_complex* tmp = fftwf_alloc_complex(static_cast<size_t>(n));
  fftwf_plan p = fftwf_plan_dft_1d(n, tmp, tmp, sign, FFTW_ESTIMATE | FFTW_UNALIGNED);
  fftwf_free(tmp);
  if (!p) throw std::runtime_error("convolution: FFTW could not make a plan");
  return Plan(p);
}

// Smallest n' >= n of the form 2^a 3^b 5^c 7^d (sizes FFTW handles fastest).
long good_fft_size(long n) {
  for (long m = std::max(n, 1L);; ++m) {
    long r = m;
    for (long f : {2L, 3L, 5L, 7L})
      while (r % f == 0) r /= f;
    if (r == 1) return m;
  }
}

ImageF convolve_fft(const ImageF& img, const Eigen::Matrix2d& cov, double min_valid) {
  const long ny = img.rows(), nx = img.cols();
  // Zero padding: 5 kernel sigmas along each axis (wrap-around weight < 4e-6).
  const long padx = static_cast<long>(std::ceil(5.0 * std::sqrt(cov(0, 0)))) + 1;
  const long pady = static_cast<long>(std::ceil(5.0 * std::sqrt(cov(1, 1)))) + 1;
  const long px = good_fft_size(nx + padx), py = good_fft_size(ny + pady);
  using cf = std::complex<float>;
  std::unique_ptr<cf[], void (*)(cf*)> buf(
      reinterpret_cast<cf*>(fftwf_alloc_complex(static_cast<size_t>(px * py))),
      [](cf* p) { fftwf_free(reinterpret_cast<fftwf_complex*>(p)); });
  if (!buf) throw std::bad_alloc();
  // Pack data (real part, 0 where blank) and validity (imaginary part): the kernel
  // is real and even, so its transfer function is real and the two parts are
  // convolved independently by one complex transform.
  tbb::parallel_for(tbb::blocked_range<long>(0, py, 16), [&](const tbb::blocked_range<long>& r) {
    for (long y = r.begin(); y != r.end(); ++y) {
      cf* row = buf.get() + y * px;
      for (long x = 0; x < px; ++x) {
        if (y < ny && x < nx) {
          const float v = img(y, x);
          row[x] = std::isnan(v) ? cf(0.0f, 0.0f) : cf(v, 1.0f);
        } else {
          row[x] = cf(0.0f, 0.0f);
        }
      }
    }
  });
  Plan fx = make_plan(static_cast<int>(px), FFTW_FORWARD);
  Plan bx = make_plan(static_cast<int>(px), FFTW_BACKWARD);
  Plan fy = make_plan(static_cast<int>(py), FFTW_FORWARD);
  Plan by = make_plan(static_cast<int>(py), FFTW_BACKWARD);
  auto as_fftw = [](cf* p) { return reinterpret_cast<fftwf_complex*>(p); };
  // Rows >= ny are zero and stay zero under the row transform.
  tbb::parallel_for(tbb::blocked_range<long>(0, ny, 8), [&](const tbb::blocked_range<long>& r) {
    for (long y = r.begin(); y != r.end(); ++y)
      fftwf_execute_dft(fx.get(), as_fftw(buf.get() + y * px), as_fftw(buf.get() + y * px));
  });
  // Columns in blocks of 8 (one cache line of complex floats per row): gather,
  // forward, multiply by H(k) = exp(-2 pi^2 k^T C k) (Fourier transform of a
  // unit-integral Gaussian of covariance C, k in cycles/pixel), backward,
  // scatter the first ny rows.
  const double a = cov(0, 0), b = 0.5 * (cov(0, 1) + cov(1, 0)), c = cov(1, 1);
  const double two_pi2 = 2.0 * kPi * kPi;
  constexpr long kBlock = 8;
  tbb::parallel_for(tbb::blocked_range<long>(0, (px + kBlock - 1) / kBlock, 4),
                    [&](const tbb::blocked_range<long>& r) {
    std::vector<cf> col(static_cast<size_t>(py * kBlock));
    for (long blk = r.begin(); blk != r.end(); ++blk) {
      const long x0 = blk * kBlock, x1 = std::min(px, x0 + kBlock);
      for (long y = 0; y < py; ++y)
        for (long x = x0; x < x1; ++x) col[(x - x0) * py + y] = buf[y * px + x];
      for (long x = x0; x < x1; ++x) {
        cf* cp = col.data() + (x - x0) * py;
        fftwf_execute_dft(fy.get(), as_fftw(cp), as_fftw(cp));
        const double kx = static_cast<double>(x <= px / 2 ? x : x - px) / static_cast<double>(px);
        for (long y = 0; y < py; ++y) {
          const double ky = static_cast<double>(y <= py / 2 ? y : y - py) / static_cast<double>(py);
          const double h = std::exp(-two_pi2 * (a * kx * kx + 2.0 * b * kx * ky + c * ky * ky));
          cp[y] *= static_cast<float>(h);
        }
        fftwf_execute_dft(by.get(), as_fftw(cp), as_fftw(cp));
      }
      for (long y = 0; y < ny; ++y)
        for (long x = x0; x < x1; ++x) buf[y * px + x] = col[(x - x0) * py + y];
    }
  });
  ImageF out(ny, nx);
  const float norm = 1.0f / static_cast<float>(static_cast<double>(px) * static_cast<double>(py));
  tbb::parallel_for(tbb::blocked_range<long>(0, ny, 8), [&](const tbb::blocked_range<long>& r) {
    for (long y = r.begin(); y != r.end(); ++y) {
      cf* row = buf.get() + y * px;
      fftwf_execute_dft(bx.get(), as_fftw(row), as_fftw(row));
      for (long x = 0; x < nx; ++x) {
        const float v = row[x].real() * norm, w = row[x].imag() * norm;
        out(y, x) = (std::isnan(img(y, x)) || !(w >= min_valid)) ? NAN : v / w;
      }
    }
  });
  return out;
}

ImageF convolve_direct(const ImageF& img, const Eigen::Matrix2d& cov, double min_valid) {
  const long ny = img.rows(), nx = img.cols();
  const long rx = static_cast<long>(std::ceil(4.0 * std::sqrt(cov(0, 0))));
  const long ry = static_cast<long>(std::ceil(4.0 * std::sqrt(cov(1, 1))));
  const Eigen::Matrix2d ci = cov.inverse();
  const long kw = 2 * rx + 1;
  std::vector<double> k(static_cast<size_t>(kw * (2 * ry + 1)));
  double sum = 0.0;
  for (long dy = -ry; dy <= ry; ++dy)
    for (long dx = -rx; dx <= rx; ++dx) {
      const double q = ci(0, 0) * dx * dx + 2.0 * ci(0, 1) * dx * dy + ci(1, 1) * dy * dy;
      const double v = std::exp(-0.5 * q);
      k[(dy + ry) * kw + dx + rx] = v;
      sum += v;
    }
  for (double& v : k) v /= sum;  // unit sum
  ImageF out(ny, nx);
  tbb::parallel_for(tbb::blocked_range<long>(0, ny, 4), [&](const tbb::blocked_range<long>& r) {
    for (long y = r.begin(); y != r.end(); ++y)
      for (long x = 0; x < nx; ++x) {
        if (std::isnan(img(y, x))) {
          out(y, x) = NAN;
          continue;
        }
        double s = 0.0, w = 0.0;
        for (long dy = -ry; dy <= ry; ++dy) {
          const long yy = y + dy;
          if (yy < 0 || yy >= ny) continue;
          const double* kr = &k[(dy + ry) * kw + rx];
          for (long dx = -rx; dx <= rx; ++dx) {
            const long xx = x + dx;
            if (xx < 0 || xx >= nx) continue;
            const float v = img(yy, xx);
            if (std::isnan(v)) continue;
            s += kr[dx] * v;
            w += kr[dx];
          }
        }
        out(y, x) = w >= min_valid ? static_cast<float>(s / w) : NAN;
      }
  });
  return out;
}

}  // namespace

ImageF convolve_gaussian_pixels(const ImageF& image, const Eigen::Matrix2d& cov,
                                const ConvolveOptions& options, bool* used_fft) {
  if (!(cov.determinant() > 0.0) || !(cov(0, 0) > 0.0) || !cov.allFinite())
    throw std::invalid_argument("convolution: kernel covariance is not positive definite");
  if (image.size() == 0) return image;
  Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> es(cov);
  const double smin = std::sqrt(es.eigenvalues()(0));
  // Cost model (operations): direct ~ N (2rx+1)(2ry+1); FFT ~ 4 passes of
  // 5 Np log2 Np complex flops with Np the padded size. The direct sampled kernel
  // is used only where it is well sampled (minor sigma >= 1 pixel).
  const double n = static_cast<double>(image.size());
  const double rx = std::ceil(4.0 * std::sqrt(cov(0, 0))), ry = std::ceil(4.0 * std::sqrt(cov(1, 1)));
  const double direct = n * (2 * rx + 1) * (2 * ry + 1);
  const double np = (image.cols() + 5.0 * std::sqrt(cov(0, 0)) + 1) *
                    (image.rows() + 5.0 * std::sqrt(cov(1, 1)) + 1);
  const double fft = 20.0 * np * std::log2(np);
  bool use_fft = options.method == 2 || (options.method == 0 && (smin < 1.0 || fft < direct));
  if (options.method == 1) use_fft = false;
  if (used_fft) *used_fft = use_fft;
  return use_fft ? convolve_fft(image, cov, options.min_valid_fraction)
                 : convolve_direct(image, cov, options.min_valid_fraction);
}

ConvolveResult convolve_to_beam(const ImageF& image, const PixelSky& wcs, const Beam& from,
                                const Beam& to, const ConvolveOptions& options) {
  if (!from.valid() || !to.valid()) throw std::invalid_argument("convolution: invalid beam");
  // Kernel C_to - C_from (REF-CONV-02); both eigenvalues must be > 0.
  const auto kernel = convolution_kernel(to_ellipse(from), to_ellipse(to),
                                         1e-9 * to.maj_arcsec * to.maj_arcsec);
  if (!kernel)
    throw std::invalid_argument("convolution: the target beam is not larger than the image's beam in every direction");
  const auto geom = local_geometry(wcs, 0.5 * (image.cols() - 1), 0.5 * (image.rows() - 1));
  if (!geom) throw std::invalid_argument("convolution: no sky position at the image centre");
  const Eigen::Matrix2d cpix = geom->sky_cov_to_pixel(ellipse_to_cov(*kernel));
  ConvolveResult out;
  out.kernel = to_beam(*kernel);
  out.image = convolve_gaussian_pixels(image, cpix, options, &out.used_fft);
  // Jy/beam_from -> Jy/beam_to: Omega_to / Omega_from = (M_to m_to)/(M_from m_from)
  // (REF-CONV-02, common practice).
  out.rescale = (to.maj_arcsec * to.min_arcsec) / (from.maj_arcsec * from.min_arcsec);
  out.image *= static_cast<float>(out.rescale);
  return out;
}

}  // namespace skerry
