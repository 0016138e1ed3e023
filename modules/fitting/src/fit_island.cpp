// Island decomposition and weighted multi-Gaussian fits; see skerry/fitting.h.
#include <tbb/parallel_for.h>

#include <Eigen/Eigenvalues>
#include <Eigen/LU>
#include <algorithm>
#include <cmath>
#include <limits>
#include <numeric>

#include "fitting_internal.h"
#include "skerry/constants.h"
#include "skerry/fitting.h"

namespace skerry {

std::string_view to_string(ErrorModel m) {
  switch (m) {
    case ErrorModel::kSandwich: return "sandwich";
    case ErrorModel::kWhite: return "white";
  }
  return "unknown";
}

std::string_view to_string(ComponentStatus s) {
  switch (s) {
    case ComponentStatus::kFitted: return "fitted";
    case ComponentStatus::kNotConverged: return "not_converged";
    case ComponentStatus::kMoments: return "moments";
    case ComponentStatus::kBadInput: return "bad_input";
  }
  return "unknown";
}

namespace {

using Mat6 = Eigen::Matrix<double, 6, 6>;
using BoolVec = Eigen::Matrix<bool, Eigen::Dynamic, 1>;

// Shape of a 2x2 covariance: sigmas along the principal axes and the angle of the
// major axis from +x towards +y [rad, 0..pi).
struct Shape {
  double sa = 0.0, sb = 0.0, t = 0.0;
};
Shape shape_of(const Eigen::Matrix2d& C) {
  const double a = C(0, 0), d = C(1, 1), b = 0.5 * (C(0, 1) + C(1, 0));
  const double mean = 0.5 * (a + d), half = std::hypot(0.5 * (a - d), b);
  Shape s;
  s.sa = std::sqrt(std::max(mean + half, 0.0));
  s.sb = std::sqrt(std::max(mean - half, 0.0));
  // Major eigenvector (cos t, sin t): tan 2t = 2b / (a - d).
  s.t = 0.5 * std::atan2(2.0 * b, a - d);
  if (s.t < 0.0) s.t += kPi;
  return s;
}

double wrap_pi(double t) {
  double r = std::fmod(t, kPi);
  if (r < 0.0) r += kPi;
  if (r >= kPi) r -= kPi;
  return r;
}

// Pixels entering the fit, in cutout order (row-major).
struct Region {
  int nx = 0, ny = 0;
  std::vector<int> cx, cy;      // cutout coordinates
  std::vector<double> x, y;     // image coordinates (0-based)
  std::vector<double> d, w;     // data [Jy/beam], 1 / rms
  std::vector<int> index_of;    // cutout linear index -> region index or -1
  std::vector<char> in_island;  // 1 for island pixels, 0 for the fit margin
  int n() const { return static_cast<int>(x.size()); }
};

// Beam-shaped noise correlation rho(d) = exp(-d^T C^-1 d / 2) on integer offsets,
// zero beyond the cutoff: a list of the non-zero offsets and a dense
// (2 ry + 1) x (2 rx + 1) table.
struct CorrTable {
  Eigen::Matrix2d C = Eigen::Matrix2d::Zero();
  double cut = -1.0;
  int rx = 0, ry = 0;
  std::vector<int> ox, oy;
  std::vector<double> rho, dense;
  double at(int dx, int dy) const {
    if (dx < -rx || dx > rx || dy < -ry || dy > ry) return 0.0;
    return dense[(dy + ry) * (2 * rx + 1) + dx + rx];
  }
};
void make_corr_table(const Eigen::Matrix2d& C, double cut_sigma, CorrTable& t) {
  if (t.cut == cut_sigma && t.C == C) return;  // same beam as the previous island
  t = CorrTable();
  t.C = C;
  t.cut = cut_sigma;
  const Eigen::Matrix2d Ci = C.inverse();
  t.rx = static_cast<int>(std::ceil(cut_sigma * std::sqrt(C(0, 0))));
  t.ry = static_cast<int>(std::ceil(cut_sigma * std::sqrt(C(1, 1))));
  t.dense.assign(static_cast<std::size_t>(2 * t.rx + 1) * (2 * t.ry + 1), 0.0);
  const double cut2 = cut_sigma * cut_sigma;
  for (int dy = -t.ry; dy <= t.ry; ++dy)
    for (int dx = -t.rx; dx <= t.rx; ++dx) {
      const double q = Ci(0, 0) * dx * dx + 2.0 * Ci(0, 1) * dx * dy + Ci(1, 1) * dy * dy;
      if (q <= cut2) {
        const double r = std::exp(-0.5 * q);
        t.ox.push_back(dx);
        t.oy.push_back(dy);
        t.rho.push_back(r);
        t.dense[(dy + t.ry) * (2 * t.rx + 1) + dx + t.rx] = r;
      }
    }
}

// J^T R J for whitened Jacobian rows on the region's pixels: sum_i sum_j rho_ij
// J_i^T J_j, over pixel pairs (small regions) or over the table's offsets of
// each pixel (large regions), whichever visits fewer pairs. Fixed order: the
// result does not depend on threads.
Eigen::MatrixXd correlated_meat(const Eigen::MatrixXd& J, const Region& reg, const CorrTable& ct) {
  const int n = static_cast<int>(J.cols()), N = reg.n();
  // Row-major copy: rows are the unit of work below.
  const Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor> Jr = J;
  Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor> RJ =
      Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>::Zero(N, n);
  const int nt = static_cast<int>(ct.rho.size());
  if (N <= nt) {
    for (int i = 0; i < N; ++i) {
      double* out = RJ.row(i).data();
      for (int j = 0; j < N; ++j) {
        const double r = ct.at(reg.cx[j] - reg.cx[i], reg.cy[j] - reg.cy[i]);
        if (r == 0.0) continue;
        const double* in = Jr.row(j).data();
        for (int a = 0; a < n; ++a) out[a] += r * in[a];
      }
    }
  } else {
    for (int i = 0; i < N; ++i) {
      double* out = RJ.row(i).data();
      for (int k = 0; k < nt; ++k) {
        const int xx = reg.cx[i] + ct.ox[k], yy = reg.cy[i] + ct.oy[k];
        if (xx < 0 || yy < 0 || xx >= reg.nx || yy >= reg.ny) continue;
        const int j = reg.index_of[yy * reg.nx + xx];
        if (j < 0) continue;
        const double* in = Jr.row(j).data();
        for (int a = 0; a < n; ++a) out[a] += ct.rho[k] * in[a];
      }
    }
  }
  return J.transpose() * RJ;
}

struct Peak {
  int cx = 0, cy = 0;
  double value = 0.0;
  double prominence = INFINITY;
};

// Local maxima of the island with their topographic prominence, by a descending
// flood (union-find): when two basins meet at a pixel, the lower basin's peak gets
// prominence = peak height - pixel height (its key saddle). [common practice]
std::vector<Peak> find_peaks(const IslandCutout& isl, const std::vector<int>& island_px) {
  const int nx = static_cast<int>(isl.data.cols());
  std::vector<int> order = island_px;
  auto val = [&](int idx) { return static_cast<double>(isl.data(idx / nx, idx % nx)); };
  std::sort(order.begin(), order.end(), [&](int a, int b) {
    const double va = val(a), vb = val(b);
    return va > vb || (va == vb && a < b);
  });
  std::vector<int> parent(isl.data.size(), -1), root_peak(isl.data.size(), -1);
  auto find = [&](int a) {
    while (parent[a] != a) {
      parent[a] = parent[parent[a]];
      a = parent[a];
    }
    return a;
  };
  std::vector<Peak> peaks;
  const int ny = static_cast<int>(isl.data.rows());
  for (int p : order) {
    const int px = p % nx, py = p / nx;
    int roots[8], nr = 0;
    for (int dy = -1; dy <= 1; ++dy)
      for (int dx = -1; dx <= 1; ++dx) {
        if (dx == 0 && dy == 0) continue;
        const int qx = px + dx, qy = py + dy;
        if (qx < 0 || qy < 0 || qx >= nx || qy >= ny) continue;
        const int q = qy * nx + qx;
        if (parent[q] < 0) continue;
        const int r = find(q);
        bool seen = false;
        for (int k = 0; k < nr; ++k) seen |= roots[k] == r;
        if (!seen) roots[nr++] = r;
      }
    if (nr == 0) {
      parent[p] = p;
      root_peak[p] = static_cast<int>(peaks.size());
      peaks.push_back({px, py, val(p), INFINITY});
      continue;
    }
    int best = roots[0];
    for (int k = 1; k < nr; ++k) {
      const Peak& a = peaks[root_peak[roots[k]]];
      const Peak& b = peaks[root_peak[best]];
      if (a.value > b.value) best = roots[k];
    }
    for (int k = 0; k < nr; ++k) {
      if (roots[k] == best) continue;
      Peak& lower = peaks[root_peak[roots[k]]];
      lower.prominence = lower.value - val(p);
      parent[roots[k]] = best;
    }
    parent[p] = best;
  }
  return peaks;
}

// Starting values of one component (A [Jy/beam], x, y [pix], sa, sb [pix], t [rad]).
struct Init {
  double A = 0.0, x = 0.0, y = 0.0, sa = 0.0, sb = 0.0, t = 0.0;
};

struct TrialFit {
  bool usable = false;
  LmResult lm;
  int k = 0;
  bool fixed_shape = false;
  double bic = INFINITY;
};

// One correlation table per thread, rebuilt only when the beam changes.
CorrTable& corr_cache() {
  thread_local CorrTable t;
  return t;
}

class IslandFitter {
 public:
  IslandFitter(const IslandCutout& isl, const FitOptions& opt) : isl_(isl), opt_(opt) {}

  IslandFit run();

 private:
  bool prepare();
  TrialFit fit(const std::vector<Peak>& peaks, int k, bool fixed, bool moment_start);
  TrialFit fit_from(const std::vector<Init>& init, bool fixed, const LmOptions& lm_opt);
  std::vector<Init> params_of(const TrialFit& tf) const;
  bool refine(TrialFit& best, int cap, int& added);
  double lr_statistic(const TrialFit& simpler, const TrialFit& richer) const;
  void unpack(const TrialFit& tf, IslandFit& out);
  PixelComponent moments_component();
  void covariances(const Eigen::MatrixXd& Jw, const BoolVec& fixed, Eigen::MatrixXd& cov,
                   Eigen::MatrixXd& cov_white, bool& ok);
  double rms_at(double x, double y) const;
  int nearest_pixel(double x, double y) const;
  const CorrTable& corr_table() {
    make_corr_table(isl_.beam_cov_pix, opt_.correlation_cutoff_sigma, corr_cache());
    return corr_cache();
  }

  const IslandCutout& isl_;
  const FitOptions& opt_;
  Region reg_;
  std::vector<int> island_px_;
  bool touches_excluded_ = false;
  double rms_floor_ = 0.0;  // smallest rms of the fit region [Jy/beam]
  Shape beam_;
  double beam_area_pix_ = 0.0;
  double bx0_ = 0, bx1_ = 0, by0_ = 0, by1_ = 0;  // island bounding box (image pixels)
  Eigen::Matrix2d moment_cov_ = Eigen::Matrix2d::Zero();
  double mx_ = 0.0, my_ = 0.0, mpeak_ = 0.0;
};

int IslandFitter::nearest_pixel(double x, double y) const {
  int best = 0;
  double bd = INFINITY;
  for (int i = 0; i < reg_.n(); ++i) {
    const double d2 = (reg_.x[i] - x) * (reg_.x[i] - x) + (reg_.y[i] - y) * (reg_.y[i] - y);
    if (d2 < bd) {
      bd = d2;
      best = i;
    }
  }
  return best;
}

double IslandFitter::rms_at(double x, double y) const {
  const int nx = static_cast<int>(isl_.rms.cols()), ny = static_cast<int>(isl_.rms.rows());
  int cx = static_cast<int>(std::lround(x)) - isl_.x_origin;
  int cy = static_cast<int>(std::lround(y)) - isl_.y_origin;
  cx = std::clamp(cx, 0, nx - 1);
  cy = std::clamp(cy, 0, ny - 1);
  const double r = isl_.rms(cy, cx);
  if (std::isfinite(r) && r > 0.0) return r;
  // Fall back to the nearest fitted pixel's rms.
  double best = INFINITY, out = NAN;
  for (int i = 0; i < reg_.n(); ++i) {
    const double d2 = (reg_.x[i] - x) * (reg_.x[i] - x) + (reg_.y[i] - y) * (reg_.y[i] - y);
    if (d2 < best) {
      best = d2;
      out = 1.0 / reg_.w[i];
    }
  }
  return out;
}

bool IslandFitter::prepare() {
  const int ny = static_cast<int>(isl_.data.rows()), nx = static_cast<int>(isl_.data.cols());
  if (ny == 0 || nx == 0 || isl_.rms.rows() != ny || isl_.rms.cols() != nx ||
      isl_.mask.rows() != ny || isl_.mask.cols() != nx)
    return false;
  const Eigen::Matrix2d& B = isl_.beam_cov_pix;
  if (!B.allFinite() || !(B(0, 0) > 0.0) || !(B(1, 1) > 0.0) || !(B.determinant() > 0.0))
    return false;
  beam_ = shape_of(B);
  beam_area_pix_ = 2.0 * kPi * std::sqrt(B.determinant());

  reg_.nx = nx;
  reg_.ny = ny;
  reg_.index_of.assign(static_cast<std::size_t>(nx) * ny, -1);
  std::vector<std::uint8_t> use(static_cast<std::size_t>(nx) * ny, 0);
  auto valid = [&](int cy, int cx) {
    const float d = isl_.data(cy, cx), r = isl_.rms(cy, cx);
    return std::isfinite(d) && std::isfinite(r) && r > 0.0f;
  };
  int bx0 = nx, bx1 = -1, by0 = ny, by1 = -1;
  for (int cy = 0; cy < ny; ++cy)
    for (int cx = 0; cx < nx; ++cx) {
      if (isl_.mask(cy, cx) != kCutoutIsland) continue;
      if (!valid(cy, cx)) {
        touches_excluded_ = true;
        continue;
      }
      use[cy * nx + cx] = 1;
      island_px_.push_back(cy * nx + cx);
      bx0 = std::min(bx0, cx);
      bx1 = std::max(bx1, cx);
      by0 = std::min(by0, cy);
      by1 = std::max(by1, cy);
    }
  if (island_px_.empty()) return false;
  // Excluded pixels next to the island (blanked data, other islands) are noted.
  for (int idx : island_px_) {
    const int cx = idx % nx, cy = idx / nx;
    for (int dy = -1; dy <= 1; ++dy)
      for (int dx = -1; dx <= 1; ++dx) {
        const int qx = cx + dx, qy = cy + dy;
        if (qx < 0 || qy < 0 || qx >= nx || qy >= ny) continue;
        if (isl_.mask(qy, qx) == kCutoutExcluded ||
            (isl_.mask(qy, qx) != kCutoutIsland && !valid(qy, qx)))
          touches_excluded_ = true;
      }
  }
  if (opt_.fit_margin_beam_sigma > 0.0) {
    const Eigen::Matrix2d Ci = B.inverse();
    const double m2 = opt_.fit_margin_beam_sigma * opt_.fit_margin_beam_sigma;
    const int rx = static_cast<int>(std::ceil(opt_.fit_margin_beam_sigma * std::sqrt(B(0, 0))));
    const int ry = static_cast<int>(std::ceil(opt_.fit_margin_beam_sigma * std::sqrt(B(1, 1))));
    for (int idx : island_px_) {
      const int cx = idx % nx, cy = idx / nx;
      for (int dy = -ry; dy <= ry; ++dy)
        for (int dx = -rx; dx <= rx; ++dx) {
          const int qx = cx + dx, qy = cy + dy;
          if (qx < 0 || qy < 0 || qx >= nx || qy >= ny || use[qy * nx + qx]) continue;
          if (isl_.mask(qy, qx) != kCutoutFree || !valid(qy, qx)) continue;
          const double q = Ci(0, 0) * dx * dx + 2.0 * Ci(0, 1) * dx * dy + Ci(1, 1) * dy * dy;
          if (q <= m2) use[qy * nx + qx] = 2;
        }
    }
  }
  for (int cy = 0; cy < ny; ++cy)
    for (int cx = 0; cx < nx; ++cx) {
      if (!use[cy * nx + cx]) continue;
      reg_.index_of[cy * nx + cx] = reg_.n();
      reg_.cx.push_back(cx);
      reg_.cy.push_back(cy);
      reg_.x.push_back(cx + isl_.x_origin);
      reg_.y.push_back(cy + isl_.y_origin);
      reg_.d.push_back(isl_.data(cy, cx));
      reg_.in_island.push_back(use[cy * nx + cx] == 1 ? 1 : 0);
      reg_.w.push_back(1.0 / static_cast<double>(isl_.rms(cy, cx)));
    }
  rms_floor_ = INFINITY;
  for (double w : reg_.w) rms_floor_ = std::min(rms_floor_, 1.0 / w);
  bx0_ = bx0 + isl_.x_origin - 0.5;
  bx1_ = bx1 + isl_.x_origin + 0.5;
  by0_ = by0 + isl_.y_origin - 0.5;
  by1_ = by1 + isl_.y_origin + 0.5;

  // Island moments over positive island pixels (initial guesses and fallback):
  // centroid = sum I r / sum I, covariance = sum I (r - c)(r - c)^T / sum I.
  double s = 0.0, sx = 0.0, sy = 0.0;
  mpeak_ = -INFINITY;
  for (int idx : island_px_) {
    const double v = isl_.data(idx / nx, idx % nx);
    mpeak_ = std::max(mpeak_, v);
    if (v <= 0.0) continue;
    s += v;
    sx += v * (idx % nx + isl_.x_origin);
    sy += v * (idx / nx + isl_.y_origin);
  }
  if (s > 0.0) {
    mx_ = sx / s;
    my_ = sy / s;
    Eigen::Matrix2d M = Eigen::Matrix2d::Zero();
    for (int idx : island_px_) {
      const double v = isl_.data(idx / nx, idx % nx);
      if (v <= 0.0) continue;
      const double dx = idx % nx + isl_.x_origin - mx_, dy = idx / nx + isl_.y_origin - my_;
      M(0, 0) += v * dx * dx;
      M(0, 1) += v * dx * dy;
      M(1, 1) += v * dy * dy;
    }
    M(1, 0) = M(0, 1);
    moment_cov_ = M / s;
  } else {
    mx_ = 0.5 * (bx0_ + bx1_);
    my_ = 0.5 * (by0_ + by1_);
  }
  return true;
}

TrialFit IslandFitter::fit(const std::vector<Peak>& peaks, int k, bool fixed, bool moment_start) {
  const double smax = std::max(bx1_ - bx0_, by1_ - by0_) + 2.0 * beam_.sa;
  std::vector<Init> init(k);
  for (int c = 0; c < k; ++c) {
    const Peak& pk = peaks[c];
    Init& in = init[c];
    in.A = std::max(pk.value, rms_floor_);
    in.x = pk.cx + isl_.x_origin;
    in.y = pk.cy + isl_.y_origin;
    Shape sh = beam_;
    if (moment_start && k == 1) {
      in.x = std::clamp(mx_, bx0_, bx1_);
      in.y = std::clamp(my_, by0_, by1_);
      const Shape ms = shape_of(moment_cov_);
      if (ms.sa > beam_.sa || ms.sb > beam_.sb) {
        sh.sa = std::clamp(ms.sa, beam_.sb, smax);
        sh.sb = std::clamp(ms.sb, beam_.sb, smax);
        sh.t = ms.t;
      }
    }
    in.sa = sh.sa;
    in.sb = sh.sb;
    in.t = sh.t;
  }
  return fit_from(init, fixed, opt_.lm);
}

TrialFit IslandFitter::fit_from(const std::vector<Init>& init, bool fixed, const LmOptions& lm_opt) {
  TrialFit tf;
  const int k = static_cast<int>(init.size());
  tf.k = k;
  tf.fixed_shape = fixed;
  const int npc = fixed ? 3 : 6;
  const int n = npc * k;
  const int m = reg_.n();
  if (m < n + 1) return tf;
  Eigen::VectorXd p0(n), lo(n), hi(n);
  const double smin = opt_.min_size_beam_fraction * beam_.sb;
  const double smax = std::max(bx1_ - bx0_, by1_ - by0_) + 2.0 * beam_.sa;
  for (int c = 0; c < k; ++c) {
    const Init& in = init[c];
    p0.segment(npc * c, 3) << std::max(in.A, rms_floor_), std::clamp(in.x, bx0_, bx1_),
        std::clamp(in.y, by0_, by1_);
    lo.segment(npc * c, 3) << 0.0, bx0_, by0_;
    hi.segment(npc * c, 3) << INFINITY, bx1_, by1_;
    if (!fixed) {
      p0.segment(npc * c + 3, 3) << std::clamp(in.sa, smin, smax), std::clamp(in.sb, smin, smax),
          in.t;
      lo.segment(npc * c + 3, 3) << smin, smin, -INFINITY;
      hi.segment(npc * c + 3, 3) << smax, smax, INFINITY;
    }
  }
  const double bshape[3] = {beam_.sa, beam_.sb, beam_.t};
  std::vector<fitting_detail::GaussEval> ev;
  ev.reserve(k);
  LmFunctor f = [&](const Eigen::VectorXd& p, Eigen::VectorXd& r, Eigen::MatrixXd* J) {
    ev.clear();
    for (int c = 0; c < k; ++c) {
      double q[6];
      for (int j = 0; j < 3; ++j) q[j] = p(npc * c + j);
      for (int j = 3; j < 6; ++j) q[j] = fixed ? bshape[j - 3] : p(npc * c + j);
      ev.emplace_back(q);
    }
    double grad[6];
    for (int i = 0; i < m; ++i) {
      double model = 0.0;
      for (int c = 0; c < k; ++c) {
        double g;
        ev[c].eval(reg_.x[i], reg_.y[i], g, J ? grad : nullptr);
        model += g;
        if (J)
          for (int j = 0; j < npc; ++j) (*J)(i, npc * c + j) = -reg_.w[i] * grad[j];
      }
      r(i) = reg_.w[i] * (reg_.d[i] - model);
    }
    return true;
  };
  LevenbergMarquardt lm(lm_opt);
  lm.set_bounds(lo, hi);
  tf.lm = lm.solve(f, p0, m);
  const LmStatus st = tf.lm.status;
  tf.usable = lm_converged(st) || st == LmStatus::kMaxIterations || st == LmStatus::kDampingOverflow;
  if (tf.usable) {
    // A component that died on the amplitude bound is rejected: with k > 1 the
    // fit with fewer components is used, with k = 1 the island's moments.
    // "Died" = below 1e-6 of the smallest rms of the region (numerically zero).
    for (int c = 0; c < k; ++c)
      if (!(tf.lm.params(npc * c) > 1e-6 * rms_floor_)) tf.usable = false;
  }
  const double neff = std::max(static_cast<double>(m) / beam_area_pix_, 1.0);
  tf.bic = tf.lm.chi2 / std::max(beam_area_pix_, 1.0) + n * std::log(std::max(neff, 1.0 + 1e-9));
  return tf;
}

std::vector<Init> IslandFitter::params_of(const TrialFit& tf) const {
  const int npc = tf.fixed_shape ? 3 : 6;
  std::vector<Init> out(tf.k);
  for (int c = 0; c < tf.k; ++c) {
    const double* q = tf.lm.params.data() + npc * c;
    out[c] = tf.fixed_shape ? Init{q[0], q[1], q[2], beam_.sa, beam_.sb, beam_.t}
                            : Init{q[0], q[1], q[2], q[3], q[4], q[5]};
  }
  return out;
}

// Likelihood-ratio statistic of a richer fit against a simpler one,
//   Lambda = 2 (chi2_simpler - chi2_richer) / Omega_beam_pix,
// with chi2 the whitened (pixel-independent) sums. In noise whose correlation
// is the beam, rho(d) = exp(-d^T C_beam^-1 d / 2), a beam-shaped change of peak
// a sigma adds a^2 Omega_beam / 2 to the whitened chi2 (the integral of g^2 is
// pi sqrt(det C_beam) = Omega_beam / 2) and a^2 to the generalised chi2
// r^T Sigma^-1 r (the image is its own matched filter in such noise: the
// optimal signal-to-noise of a beam-shaped source is its peak over the rms)
// [derived, docs/CONVENTIONS.md "Noise"]. Lambda is therefore the
// generalised-chi2 likelihood ratio for changes on the scale of the beam, and
// about twice it for broad changes, which makes broad additions easier to keep.
double IslandFitter::lr_statistic(const TrialFit& simpler, const TrialFit& richer) const {
  return 2.0 * (simpler.lm.chi2 - richer.lm.chi2) / std::max(beam_area_pix_, 1.0);
}

// Residual-driven decomposition (see fit_island in skerry/fitting.h): from the
// fit `best`, propose (a) a beam-shaped component at the most significant
// positive whitened residual of the island and (b) the split of the component
// that is most elongated beyond the beam into two beam-wide components along
// its major axis; refit each proposal from the current parameters, keep the
// better one when its likelihood-ratio statistic against `best` reaches
// FitOptions::add_min_lr, and repeat until no proposal passes or `cap`
// components are reached. Deterministic: proposals and fits depend on the
// island only. Returns true when significant residual structure remains at
// the cap.

bool IslandFitter::refine(TrialFit& best, int cap, int& added) {
  const int m = reg_.n();
  auto worst_residual = [&](const TrialFit& tf, int& at) {
    double rmax = -INFINITY;
    at = -1;
    for (int i = 0; i < m; ++i)
      if (reg_.in_island[i] && tf.lm.residuals(i) > rmax) {
        rmax = tf.lm.residuals(i);
        at = i;
      }
    return rmax;
  };
  const Eigen::Matrix2d& B = isl_.beam_cov_pix;
  LmOptions screen_lm = opt_.lm;
  screen_lm.max_iterations = std::min(opt_.lm.max_iterations, 30);
  screen_lm.step_rel_tol = std::max(opt_.lm.step_rel_tol, 1e-4);
  screen_lm.chi2_rel_tol = std::max(opt_.lm.chi2_rel_tol, 1e-4);
  screen_lm.gradient_tol = std::max(opt_.lm.gradient_tol, 1e-5);
  // A proposal is kept only when it lowers chi2 by add_min_lr Omega_beam / 2,
  // which needs at least that much chi2 now.
  const double need_chi2 = 0.5 * opt_.add_min_lr * beam_area_pix_;
  while (best.k < cap && best.lm.chi2 >= need_chi2) {
    const std::vector<Init> base = params_of(best);
    std::vector<std::vector<Init>> proposals;
    int at = -1;
    const double rmax = worst_residual(best, at);
    if (at >= 0 && rmax >= opt_.residual_snr) {
      std::vector<Init> p = base;
      p.push_back({rmax / reg_.w[at], reg_.x[at], reg_.y[at], beam_.sa, beam_.sb, beam_.t});
      proposals.push_back(std::move(p));
    }
    if (!best.fixed_shape) {
      // Excess variance along each component's major axis over the beam's
      // variance in that direction, u^T C_beam u, as a fraction e of the latter,
      // less the same excess across the axis: two point sources side by side
      // widen a component along the line joining them only, a source resolved
      // in both directions is no pair. A point source's fitted e scatters by
      // about 2 sqrt(2) / SNR (twice the fractional error of the size,
      // sqrt(2) / SNR for a beam-sized component: Condon 1997, REF-CONDON-02),
      // so only an e beyond twice that is proposed.
      int split = -1;
      double best_ratio = 0.0;
      for (int c = 0; c < best.k; ++c) {
        const Init& q = base[c];
        const double sa = std::max(q.sa, q.sb), sb = std::min(q.sa, q.sb);
        const double t = q.sa >= q.sb ? q.t : q.t + 0.5 * kPi;
        const Eigen::Vector2d u(std::cos(t), std::sin(t)), v(-std::sin(t), std::cos(t));
        const double vb = u.dot(B * u), vm = v.dot(B * v);
        const double ratio = (sa * sa - vb) / vb - std::max(0.0, (sb * sb - vm) / vm);
        const double snr = q.A * reg_.w[nearest_pixel(q.x, q.y)];
        const double need = std::max(opt_.split_min_excess, 2.0 * 2.0 * std::sqrt(2.0) / std::max(snr, 1e-9));
        if (ratio > need && ratio - need > best_ratio) {
          best_ratio = ratio - need;
          split = c;
        }
      }
      if (split >= 0) {
        const Init& q = base[split];
        const double sa = std::max(q.sa, q.sb), sb = std::min(q.sa, q.sb);
        const double t = q.sa >= q.sb ? q.t : q.t + 0.5 * kPi;
        const Eigen::Vector2d u(std::cos(t), std::sin(t));
        const double vb = u.dot(B * u), half = std::sqrt(sa * sa - vb);
        // Two components at +-half along the axis, each sqrt(vb) long: their sum
        // keeps the component's second moment along the axis and its flux
        // (A sa sb = 2 A' sqrt(vb) sb).
        const double a = 0.5 * q.A * sa / std::sqrt(vb);
        std::vector<Init> p = base;
        p[split] = {a, q.x + half * u.x(), q.y + half * u.y(), std::sqrt(vb), sb, t};
        p.push_back({a, q.x - half * u.x(), q.y - half * u.y(), std::sqrt(vb), sb, t});
        proposals.push_back(std::move(p));
      }
    }
    if (proposals.empty()) break;
    // Proposals are screened with looser solver tolerances (relative chi2 and
    // step 1e-4, at most 30 steps: a proposal's chi2 can only fall further, so
    // the screen errs towards rejecting); one that comes within 20 % of the
    // threshold is refitted to the full tolerances from its screened
    // parameters and decided on that fit.
    TrialFit chosen;
    for (const auto& p : proposals) {
      TrialFit tf = fit_from(p, best.fixed_shape, screen_lm);
      if (tf.usable && (!chosen.usable || tf.lm.chi2 < chosen.lm.chi2)) chosen = std::move(tf);
    }
    if (!chosen.usable || !(lr_statistic(best, chosen) >= 0.8 * opt_.add_min_lr)) break;
    chosen = fit_from(params_of(chosen), best.fixed_shape, opt_.lm);
    if (!chosen.usable || !(lr_statistic(best, chosen) >= opt_.add_min_lr)) break;
    best = std::move(chosen);
    ++added;
  }
  int at = -1;
  return best.k >= cap && worst_residual(best, at) >= opt_.residual_snr;
}

void IslandFitter::covariances(const Eigen::MatrixXd& Jw, const BoolVec& fixed,
                               Eigen::MatrixXd& cov, Eigen::MatrixXd& cov_white, bool& ok) {
  // Bread (J^T W J)^-1 once; the sandwich puts J^T W C W J between two of them.
  ok = lm_covariance(Jw, cov_white, fixed);
  if (opt_.error_model == ErrorModel::kWhite || !ok) {
    cov = cov_white;
    return;
  }
  const Eigen::MatrixXd meat = correlated_meat(Jw, reg_, corr_table());
  cov = cov_white * meat * cov_white;
  cov = (0.5 * (cov + cov.transpose())).eval();
  ok = cov.allFinite();
}

void IslandFitter::unpack(const TrialFit& tf, IslandFit& out) {
  const int k = tf.k, npc = tf.fixed_shape ? 3 : 6;
  const Eigen::VectorXd& p = tf.lm.params;
  // Parameters on a bound keep their (curvature-based) covariance: the flags say
  // they are on a bound. Only a direction with no information is held fixed.
  BoolVec fixed = BoolVec::Constant(p.size(), false);
  // A theta whose Jacobian column vanishes (circular component) is held fixed for
  // the covariance; its variance is reported as NaN.
  std::vector<int> degenerate_theta;
  if (!tf.fixed_shape)
    for (int c = 0; c < k; ++c) {
      const int j = npc * c + 5;
      if (!(tf.lm.jacobian.col(j).squaredNorm() >
            1e-20 * tf.lm.jacobian.col(npc * c + 3).squaredNorm())) {
        fixed(j) = true;
        degenerate_theta.push_back(c);
      }
    }
  Eigen::MatrixXd cov, covw;
  bool ok = true;
  covariances(tf.lm.jacobian, fixed, cov, covw, ok);
  out.lm_status = tf.lm.status;
  out.lm_iterations = tf.lm.iterations;
  out.chi2 = tf.lm.chi2;
  out.dof = reg_.n() - static_cast<int>(p.size());
  out.reduced_chi2 = out.dof > 0 ? out.chi2 / out.dof : NAN;
  out.residual_rms = 0.0;
  for (int i = 0; i < reg_.n(); ++i) {
    const double res = tf.lm.residuals(i) / reg_.w[i];
    out.residual_rms += res * res;
  }
  out.residual_rms = std::sqrt(out.residual_rms / reg_.n());
  for (int c = 0; c < k; ++c) {
    PixelComponent pc;
    pc.amplitude = p(npc * c);
    pc.x = p(npc * c + 1);
    pc.y = p(npc * c + 2);
    int map[6] = {npc * c, npc * c + 1, npc * c + 2, -1, -1, -1};
    double t;
    if (tf.fixed_shape) {
      pc.sigma_major_pix = beam_.sa;
      pc.sigma_minor_pix = beam_.sb;
      t = beam_.t;
      pc.fit_flags |= kFitShapeFixed;
    } else {
      double sa = p(npc * c + 3), sb = p(npc * c + 4);
      t = p(npc * c + 5);
      map[3] = npc * c + 3;
      map[4] = npc * c + 4;
      map[5] = npc * c + 5;
      if (sb > sa) {  // normalise: sigma_major >= sigma_minor
        std::swap(sa, sb);
        std::swap(map[3], map[4]);
        t += 0.5 * kPi;
      }
      pc.sigma_major_pix = sa;
      pc.sigma_minor_pix = sb;
      for (int j = 3; j < 5; ++j)
        if (tf.lm.at_bound(npc * c + j)) pc.fit_flags |= kFitAtSizeBound;
    }
    pc.theta_rad = wrap_pi(t);
    for (int j = 1; j < 3; ++j)
      if (tf.lm.at_bound(npc * c + j)) pc.fit_flags |= kFitAtPositionBound;
    for (int a = 0; a < 6; ++a)
      for (int b = 0; b < 6; ++b) {
        const bool have = map[a] >= 0 && map[b] >= 0;
        pc.cov(a, b) = have ? cov(map[a], map[b]) : 0.0;
        pc.cov_white(a, b) = have ? covw(map[a], map[b]) : 0.0;
      }
    for (int dc : degenerate_theta)
      if (dc == c) {
        pc.cov(kParTheta, kParTheta) = NAN;
        pc.cov_white(kParTheta, kParTheta) = NAN;
      }
    if (!ok) pc.fit_flags |= kFitSingularCov;
    if (touches_excluded_) pc.fit_flags |= kFitExcludedPixels;
    pc.status = lm_converged(tf.lm.status) ? ComponentStatus::kFitted : ComponentStatus::kNotConverged;
    if (pc.status == ComponentStatus::kNotConverged) pc.fit_flags |= kFitNotConverged;
    pc.local_rms = rms_at(pc.x, pc.y);
    out.components.push_back(pc);
  }
}

PixelComponent IslandFitter::moments_component() {
  // Moment-based measurement: peak pixel value, intensity-weighted centroid and
  // second moments (the beam where the moments are not positive definite).
  Shape sh = shape_of(moment_cov_);
  if (!(moment_cov_.determinant() > 0.0) || !(sh.sb > 0.0)) sh = beam_;
  PixelComponent pc;
  pc.amplitude = mpeak_;
  pc.x = mx_;
  pc.y = my_;
  pc.sigma_major_pix = sh.sa;
  pc.sigma_minor_pix = sh.sb;
  pc.theta_rad = wrap_pi(sh.t);
  pc.status = ComponentStatus::kMoments;
  pc.fit_flags |= kFitMomentsFallback;
  if (touches_excluded_) pc.fit_flags |= kFitExcludedPixels;
  pc.local_rms = rms_at(pc.x, pc.y);
  // Expected errors: the covariance at the moment parameters from the same
  // Jacobian the fit would use.
  const int m = reg_.n();
  if (m >= 7 && pc.amplitude > 0.0) {
    Eigen::MatrixXd J(m, 6);
    const double q[6] = {pc.amplitude, pc.x, pc.y, pc.sigma_major_pix, pc.sigma_minor_pix,
                         pc.theta_rad};
    fitting_detail::GaussEval ev(q);
    double grad[6], g;
    for (int i = 0; i < m; ++i) {
      ev.eval(reg_.x[i], reg_.y[i], g, grad);
      for (int j = 0; j < 6; ++j) J(i, j) = -reg_.w[i] * grad[j];
    }
    BoolVec fixed = BoolVec::Constant(6, false);
    if (!(J.col(5).squaredNorm() > 1e-20 * J.col(3).squaredNorm())) fixed(5) = true;
    Eigen::MatrixXd cov, covw;
    bool ok = true;
    covariances(J, fixed, cov, covw, ok);
    pc.cov = cov;
    pc.cov_white = covw;
    if (fixed(5)) pc.cov(5, 5) = pc.cov_white(5, 5) = NAN;
    if (!ok) pc.fit_flags |= kFitSingularCov;
  } else {
    pc.fit_flags |= kFitSingularCov;
  }
  return pc;
}

IslandFit IslandFitter::run() {
  IslandFit out;
  out.island_id = isl_.island_id;
  if (!prepare()) {
    PixelComponent bad;
    bad.amplitude = bad.x = bad.y = bad.sigma_major_pix = bad.sigma_minor_pix = bad.theta_rad = NAN;
    bad.local_rms = NAN;
    bad.status = ComponentStatus::kBadInput;
    bad.fit_flags = kFitSingularCov | (touches_excluded_ ? kFitExcludedPixels : 0u);
    out.components.push_back(bad);
    out.reduced_chi2 = NAN;
    out.lm_status = LmStatus::kBadInput;
    return out;
  }
  out.n_fit_pixels = reg_.n();
  out.beam_area_pix = beam_area_pix_;

  // (1) significant maxima, most prominent first (the island maximum has infinite
  // prominence), capped at max_components.
  std::vector<Peak> all = find_peaks(isl_, island_px_);
  std::vector<Peak> peaks;
  for (const Peak& pk : all) {
    const double r = rms_at(pk.cx + isl_.x_origin, pk.cy + isl_.y_origin);
    if (pk.prominence == INFINITY || pk.prominence >= opt_.prominence_snr * r) peaks.push_back(pk);
  }
  std::stable_sort(peaks.begin(), peaks.end(), [](const Peak& a, const Peak& b) {
    return a.prominence > b.prominence || (a.prominence == b.prominence && a.value > b.value);
  });
  out.n_maxima = static_cast<int>(peaks.size());
  const int kmax = std::max(1, std::min<int>(static_cast<int>(peaks.size()), opt_.max_components));
  const bool fixed = opt_.fix_shape_to_beam;

  // (2)-(4) fits with kmax, kmax-1, ..., 1 components; keep the lowest BIC_eff.
  TrialFit best;
  LmStatus last_status = LmStatus::kNotRun;
  int last_iterations = 0;
  for (int k = kmax; k >= 1; --k) {
    TrialFit tf = fit(peaks, k, fixed, false);
    last_status = tf.lm.status;
    last_iterations = tf.lm.iterations;
    if (k == 1 && !fixed && !lm_converged(tf.lm.status)) {
      TrialFit alt = fit(peaks, 1, fixed, true);  // restart from the island moments
      if (lm_converged(alt.lm.status) || (alt.usable && alt.lm.chi2 < tf.lm.chi2)) tf = alt;
    }
    if (!tf.usable) continue;
    if (!best.usable || (opt_.use_information_criterion ? tf.bic < best.bic : false)) best = tf;
    if (!opt_.use_information_criterion && best.usable) break;
  }
  if (best.usable && opt_.residual_search) {
    const int cap = std::max(opt_.max_components, 1);
    out.residual_at_cap = refine(best, cap, out.n_added);
  }
  if (!best.usable) {
    out.components.push_back(moments_component());
    out.reduced_chi2 = NAN;
    out.lm_status = last_status;  // of the last (single-component) attempt
    out.lm_iterations = last_iterations;
    return out;
  }
  unpack(best, out);
  if (best.k < out.n_maxima) {
    for (auto& c : out.components) c.fit_flags |= kFitReducedComponents;
  }
  for (auto& c : out.components) {
    if (out.n_added > 0) c.fit_flags |= kFitAddedFromResidual;
    if (out.residual_at_cap) c.fit_flags |= kFitResidualAtCap;
  }
  std::stable_sort(out.components.begin(), out.components.end(),
                   [](const PixelComponent& a, const PixelComponent& b) {
                     return a.amplitude > b.amplitude;
                   });
  for (int i = 0; i < static_cast<int>(out.components.size()); ++i)
    out.components[i].index_in_island = i;
  return out;
}

}  // namespace

IslandFit fit_island(const IslandCutout& island, const FitOptions& options) {
  IslandFitter f(island, options);
  return f.run();
}

std::vector<IslandFit> fit_islands(const std::vector<IslandCutout>& islands,
                                   const FitOptions& options) {
  std::vector<IslandFit> out(islands.size());
  tbb::parallel_for(std::size_t(0), islands.size(),
                    [&](std::size_t i) { out[i] = fit_island(islands[i], options); });
  std::vector<std::size_t> order(islands.size());
  std::iota(order.begin(), order.end(), std::size_t(0));
  std::stable_sort(order.begin(), order.end(), [&](std::size_t a, std::size_t b) {
    return islands[a].island_id < islands[b].island_id;
  });
  std::vector<IslandFit> sorted;
  sorted.reserve(out.size());
  for (std::size_t i : order) sorted.push_back(std::move(out[i]));
  return sorted;
}

}  // namespace skerry
