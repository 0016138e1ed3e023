// Beam-correlated Gaussian noise (simulate.h, correlated_noise).
//
// Method. Let w be white noise and g the Gaussian kernel of covariance C/2
// (the beam's FWHMs / sqrt 2, same PA; docs/CONVENTIONS.md "Noise"). Then n = g * w has
// autocorrelation (g * g)(d), a Gaussian of covariance C: the beam's shape,
// exp(-0.5 d^T C^-1 d). In the Fourier domain the transform of w is again white
// (complex, Hermitian) noise and convolution is a product with the kernel's
// transfer function H(k) = exp(-2 pi^2 k^T (C/2) k) = exp(-pi^2 k^T C k),
// k in cycles per pixel (the Fourier transform of a normalised Gaussian of
// covariance S is exp(-2 pi^2 k^T S k); Bracewell, The Fourier Transform and its
// Applications, ch. 6, from memory for the chapter). So we draw the half
// spectrum Z(kx, ky), kx = 0..nx/2, directly:
//   Z = H(k) (g1 + i g2) / sqrt(2),   g1, g2 ~ N(0, 1)        (E|Z|^2 = H^2)
// and take one inverse complex-to-real FFT. The c2r transform uses only the real
// part of the kx = 0 and kx = nx/2 (nx even) columns after the column pass, which
// halves their variance; those columns are therefore drawn sqrt(2) larger. Then
// the output n(p) = sum_k Z_k exp(2 pi i k.p) is a stationary Gaussian field with
//   Var n = sum over the full grid of H(k)^2          (Parseval)
// exactly, and it is scaled by rms / sqrt(that sum): the rms is the target in
// expectation, not forced on the sample.
//
// Determinism: column kx of the spectrum is drawn from the stream
// (seed, noise, stream, kx); the 2-D inverse FFT is done as 1-D FFTW transforms
// (the same plan for every column, then for every row) executed in parallel with
// oneTBB: each 1-D transform does the same arithmetic whichever thread runs it.
#include <Eigen/LU>
#include <fftw3.h>
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cmath>
#include <complex>
#include <memory>
#include <mutex>
#include <stdexcept>
#include <string>
#include <vector>

#include "skerry/constants.h"
#include "skerry/fft_lock.h"
#include "skerry/simulate.h"
#include "stream.h"

namespace skerry::sim {

namespace {

// FFTW's planner is not thread-safe: plans are made and destroyed under the
// process-wide skerry::fftw_planner_mutex() (skerry/fft_lock.h).

struct FftwFree {
  void operator()(void* p) const { fftwf_free(p); }
};
template <class T>
using FftwBuffer = std::unique_ptr<T, FftwFree>;

template <class T>
FftwBuffer<T> fftw_alloc(std::size_t n) {
  void* p = fftwf_malloc(sizeof(T) * std::max<std::size_t>(n, 1));
  if (!p) throw std::bad_alloc();
  return FftwBuffer<T>(static_cast<T*>(p));
}

class Plan {
 public:
  explicit Plan(fftwf_plan p) : p_(p) {
    if (!p_) throw std::runtime_error("FFTW could not make a plan");
  }
  ~Plan() {
    std::lock_guard<std::mutex> lock(fftw_planner_mutex());
    fftwf_destroy_plan(p_);
  }
  Plan(const Plan&) = delete;
  Plan& operator=(const Plan&) = delete;
  fftwf_plan get() const { return p_; }

 private:
  fftwf_plan p_;
};

}  // namespace

ImageF correlated_noise(long nx, long ny, const Eigen::Matrix2d& c, double rms,
                        std::uint64_t seed, std::uint64_t stream) {
  if (nx <= 0 || ny <= 0)
    throw std::invalid_argument("correlated_noise: grid " + std::to_string(nx) + " x " +
                                std::to_string(ny) + " breaks nx, ny > 0");
  if (!(rms >= 0.0) || !std::isfinite(rms))
    throw std::invalid_argument("correlated_noise: rms = " + std::to_string(rms) +
                                " breaks rms >= 0");
  const double det = c.determinant();
  if (!(c(0, 0) > 0.0 && c(1, 1) > 0.0 && det > 0.0) || !c.allFinite() ||
      std::abs(c(0, 1) - c(1, 0)) > 1e-9 * (c(0, 0) + c(1, 1)))
    throw std::invalid_argument(
        "correlated_noise: beam covariance is not symmetric positive definite");

  const long nkx = nx / 2 + 1;
  const long pitch = (ny + 7) / 8 * 8;  // complex elements per spectrum column (64-byte rows)
  auto spec = fftw_alloc<fftwf_complex>(static_cast<std::size_t>(nkx) * pitch);
  fftwf_complex* const S = spec.get();

  // Plans (FFTW_ESTIMATE: chosen without timing, so the same on every run).
  std::unique_ptr<Plan> col_plan, row_plan;
  {
    auto tmp_c = fftw_alloc<fftwf_complex>(static_cast<std::size_t>(std::max(ny, nkx)));
    auto tmp_r = fftw_alloc<float>(static_cast<std::size_t>(nx));
    std::lock_guard<std::mutex> lock(fftw_planner_mutex());
    col_plan = std::make_unique<Plan>(fftwf_plan_dft_1d(static_cast<int>(ny), S, S,
                                                        FFTW_BACKWARD, FFTW_ESTIMATE));
    row_plan = std::make_unique<Plan>(fftwf_plan_dft_c2r_1d(static_cast<int>(nx), tmp_c.get(),
                                                            tmp_r.get(), FFTW_ESTIMATE));
  }

  const double c00 = c(0, 0), c01 = 0.5 * (c(0, 1) + c(1, 0)), c11 = c(1, 1);
  const double pi2 = kPi * kPi;
  std::vector<double> power(static_cast<std::size_t>(nkx), 0.0);  // sum of H^2, full-grid weights
  std::vector<double> hy(static_cast<std::size_t>(ny));
  for (long ky = 0; ky < ny; ++ky) {
    const long iy = ky <= ny / 2 ? ky : ky - ny;
    const double fy = static_cast<double>(iy) / static_cast<double>(ny);
    hy[static_cast<std::size_t>(ky)] = std::exp(-pi2 * fy * fy * c11);
  }

  // Pass 1: draw each spectrum column and transform it along y.
  tbb::parallel_for(tbb::blocked_range<long>(0, nkx, 8), [&](const tbb::blocked_range<long>& r) {
    for (long kx = r.begin(); kx != r.end(); ++kx) {
      detail::Stream rng(seed, detail::kPurposeNoise, static_cast<std::uint64_t>(kx), stream);
      const bool edge = (kx == 0) || (nx % 2 == 0 && kx == nx / 2);
      const double amp = edge ? 1.0 : std::sqrt(0.5);
      const double weight = edge ? 1.0 : 2.0;  // modes kx and -kx of the full grid
      const double fx = static_cast<double>(kx) / static_cast<double>(nx);
      fftwf_complex* col = S + static_cast<std::size_t>(kx) * pitch;
      // H = exp(-pi^2 (fx^2 c00 + 2 fx fy c01 + fy^2 c11)) factorised as
      //   hx * hy(iy) * r^iy,  hx = exp(-pi^2 fx^2 c00), hy = exp(-pi^2 fy^2 c11),
      //   r = exp(-2 pi^2 fx c01 / ny)
      // with r^iy by repeated multiplication (relative rounding < ny * 1.1e-16).
      const double hx = std::exp(-pi2 * fx * fx * c00);
      const double r_pos = std::exp(-2.0 * pi2 * fx * c01 / static_cast<double>(ny));
      double cross = 1.0;  // r^iy
      // The factors stay finite only while |pi^2 fx c01| is moderate (huge beams
      // with a large cross term): otherwise one exp per mode.
      const bool factorised = std::abs(pi2 * fx * c01) < 200.0;
      double p = 0.0;
      for (long ky = 0; ky < ny; ++ky) {
        const long iy = ky <= ny / 2 ? ky : ky - ny;
        // iy = 0, 1, ..., ny/2, then -(ny - ny/2 - 1), ..., -1: restart at the jump.
        if (ky == ny / 2 + 1) cross = std::pow(r_pos, static_cast<double>(iy));
        const double fy = static_cast<double>(iy) / static_cast<double>(ny);
        const double h = factorised ? hx * hy[static_cast<std::size_t>(ky)] * cross
                                    : std::exp(-pi2 * (fx * fx * c00 + 2.0 * fx * fy * c01 + fy * fy * c11));
        double g1, g2;
        rng.normal_pair(g1, g2);
        col[ky][0] = static_cast<float>(amp * h * g1);
        col[ky][1] = static_cast<float>(amp * h * g2);
        p += weight * h * h;
        cross *= r_pos;
      }
      power[static_cast<std::size_t>(kx)] = p;
      fftwf_execute_dft(col_plan->get(), col, col);
    }
  });
  double total = 0.0;
  for (double p : power) total += p;  // fixed order
  const float scale = static_cast<float>(rms / std::sqrt(total));

  // Pass 2: gather each row of the half spectrum and transform it along x.
  ImageF out(ny, nx);
  constexpr long kRows = 16;  // rows gathered together: 16 contiguous complex per column
  const long nblocks = (ny + kRows - 1) / kRows;
  tbb::parallel_for(tbb::blocked_range<long>(0, nblocks), [&](const tbb::blocked_range<long>& r) {
    auto in = fftw_alloc<fftwf_complex>(static_cast<std::size_t>(kRows * nkx));
    auto res = fftw_alloc<float>(static_cast<std::size_t>(nx));
    // Each row of `in` starts at a multiple of nkx; FFTW requires the alignment the
    // plan was made with, so rows are copied to the aligned start before use.
    auto row = fftw_alloc<fftwf_complex>(static_cast<std::size_t>(nkx));
    for (long b = r.begin(); b != r.end(); ++b) {
      const long y0 = b * kRows, y1 = std::min(ny, y0 + kRows), m = y1 - y0;
      for (long kx = 0; kx < nkx; ++kx) {
        const fftwf_complex* src = S + static_cast<std::size_t>(kx) * pitch + y0;
        for (long j = 0; j < m; ++j) {
          in.get()[j * nkx + kx][0] = src[j][0];
          in.get()[j * nkx + kx][1] = src[j][1];
        }
      }
      for (long j = 0; j < m; ++j) {
        std::copy(in.get()[j * nkx], in.get()[j * nkx] + 2 * nkx, row.get()[0]);
        fftwf_execute_dft_c2r(row_plan->get(), row.get(), res.get());
        float* dst = out.data() + static_cast<std::size_t>(y0 + j) * nx;
        for (long x = 0; x < nx; ++x) dst[x] = res.get()[x] * scale;
      }
    }
  });
  return out;
}

Eigen::Matrix2d beam_cov_pix(const Beam& beam, const PixelSky& sky, double x, double y) {
  const auto g = local_geometry(sky, x, y);
  if (!g)
    throw std::invalid_argument("beam_cov_pix: pixel (" + std::to_string(x) + ", " +
                                std::to_string(y) + ") has no sky position");
  return g->sky_cov_to_pixel(ellipse_to_cov(to_ellipse(beam)));
}

Eigen::Matrix2d beam_cov_pix_flat(const Beam& beam, double pixel_arcsec, bool east_left) {
  // Jacobian d(east, north)/d(x, y): +x is east (east_left = false) or west.
  LocalGeometry g;
  g.jac_arcsec_per_pix << (east_left ? -pixel_arcsec : pixel_arcsec), 0.0, 0.0, pixel_arcsec;
  return g.sky_cov_to_pixel(ellipse_to_cov(to_ellipse(beam)));
}

}  // namespace skerry::sim
