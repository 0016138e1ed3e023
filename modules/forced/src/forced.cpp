// Forced fixed-shape amplitude fits in one image (forced.h).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <Eigen/Cholesky>
#include <Eigen/Dense>
#include <algorithm>
#include <cmath>
#include <limits>
#include <numeric>
#include <stdexcept>
#include <unordered_map>

#include "forced_core.h"
#include "skerry/constants.h"
#include "skerry/levmar.h"

namespace skerry {
namespace detail {

double correlated_overlap(const Eigen::Matrix2d& ck, const Eigen::Matrix2d& cl,
                          const Eigen::Matrix2d& cb, const Eigen::Vector2d& d) {
  // Integral of g_k(x) g_l(y) rho(x - y) over x and y, all unit-peak Gaussians:
  // (2 pi)^2 sqrt(det Ck det Cl det Cb / det S) exp(-d^T S^-1 d / 2), S = Ck+Cl+Cb
  // (product and convolution of Gaussians; forced.h).
  const Eigen::Matrix2d s = ck + cl + cb;
  const double q = d.dot(s.inverse() * d);
  return 4.0 * kPi * kPi *
         std::sqrt(ck.determinant() * cl.determinant() * cb.determinant() / s.determinant()) *
         std::exp(-0.5 * q);
}

namespace {

struct Prep {
  bool ok = false;
  double x = NAN, y = NAN;
  Eigen::Matrix2d c = Eigen::Matrix2d::Identity();   // model covariance [pix^2]
  Eigen::Matrix2d ci = Eigen::Matrix2d::Identity();
  Eigen::Matrix2d cb = Eigen::Matrix2d::Identity();  // beam covariance [pix^2]
  double flux_factor = 1.0;                          // S / a
  double rms = NAN;
  long x0 = 0, x1 = -1, y0 = 0, y1 = -1;              // footprint box (inclusive)
  double reach = 0.0;                                 // sqrt of largest eigenvalue of C
  Eigen::Matrix2d jac = Eigen::Matrix2d::Identity();  // d(east, north)/d(x, y) [arcsec/pix]
};

// Union-find with the smallest index as root (deterministic group ids).
long find_root(std::vector<long>& p, long i) {
  while (p[i] != i) {
    p[i] = p[p[i]];
    i = p[i];
  }
  return i;
}
void unite(std::vector<long>& p, long a, long b) {
  a = find_root(p, a);
  b = find_root(p, b);
  if (a == b) return;
  if (a < b) p[b] = a;
  else p[a] = b;
}

}  // namespace

std::vector<ForcedMeasurement> forced_measure_masked(const ImageF& image, const ImageF& rms,
                                                     double rms_scalar, const PixelSky& wcs,
                                                     const Beam& beam,
                                                     const std::vector<ForcedSource>& sources,
                                                     const MaskU8* mask,
                                                     const ForcedOptions& opt) {
  if (!beam.valid()) throw std::invalid_argument("forced measurement: invalid beam");
  const long ny = image.rows(), nx = image.cols();
  const bool have_map = rms.size() > 0;
  if (have_map && (rms.rows() != ny || rms.cols() != nx))
    throw std::invalid_argument("forced measurement: rms map and image differ in shape");
  if (!have_map && !(rms_scalar > 0.0))
    throw std::invalid_argument("forced measurement: no rms map and rms_scalar <= 0");
  if (mask && mask->size() > 0 && (mask->rows() != ny || mask->cols() != nx))
    throw std::invalid_argument("forced measurement: mask and image differ in shape");
  const bool have_mask = mask && mask->size() > 0;
  auto rms_at = [&](long y, long x) { return have_map ? static_cast<double>(rms(y, x)) : rms_scalar; };
  auto usable = [&](long y, long x) {
    if (std::isnan(image(y, x))) return false;
    if (have_mask && (*mask)(y, x) != 0) return false;
    const double r = rms_at(y, x);
    return std::isfinite(r) && r > 0.0;
  };

  const std::size_t n = sources.size();
  std::vector<ForcedMeasurement> out(n);
  std::vector<Prep> prep(n);
  const Eigen::Matrix2d cbeam_sky = ellipse_to_cov(to_ellipse(beam));
  const double R = opt.fit_radius_sigma;

  // 1. Positions and shapes in this image's pixel frame.
  tbb::parallel_for(tbb::blocked_range<std::size_t>(0, n, 256), [&](const tbb::blocked_range<std::size_t>& r) {
    for (std::size_t i = r.begin(); i != r.end(); ++i) {
      ForcedMeasurement& m = out[i];
      Prep& p = prep[i];
      double x, y;
      if (!wcs.sky_to_pix(sources[i].ra_deg, sources[i].dec_deg, x, y) || !std::isfinite(x) ||
          !std::isfinite(y) || x < -0.5 || y < -0.5 || x > nx - 0.5 || y > ny - 0.5) {
        m.flags |= kForcedOutside;
        continue;
      }
      m.x = p.x = x;
      m.y = p.y = y;
      const long ix = std::clamp(std::lround(x), 0L, nx - 1), iy = std::clamp(std::lround(y), 0L, ny - 1);
      if (have_mask && (*mask)(iy, ix) != 0) {
        m.flags |= kForcedMasked;
        continue;
      }
      if (!usable(iy, ix)) {
        m.flags |= kForcedOutside;
        continue;
      }
      const auto g = local_geometry(wcs, x, y);
      if (!g) {
        m.flags |= kForcedOutside;
        continue;
      }
      const Ellipse in = sources[i].intrinsic;
      Eigen::Matrix2d cint_sky = Eigen::Matrix2d::Zero();
      if (in.maj > 0.0) cint_sky = ellipse_to_cov({in.maj, std::max(in.min, 0.0), in.pa_deg});
      const Eigen::Matrix2d cconv_sky = cbeam_sky + cint_sky;
      const Ellipse conv = cov_to_ellipse(cconv_sky);
      m.convolved_maj_arcsec = conv.maj;
      m.convolved_min_arcsec = conv.min;
      m.convolved_pa_deg = conv.pa_deg;
      p.jac = g->jac_arcsec_per_pix;
      p.cb = g->sky_cov_to_pixel(cbeam_sky);
      p.c = g->sky_cov_to_pixel(cconv_sky);
      p.ci = p.c.inverse();
      // S = a (M m)/(b_M b_m) = a sqrt(det C_conv / det C_beam) (docs/CONVENTIONS.md).
      p.flux_factor = std::sqrt(cconv_sky.determinant() / cbeam_sky.determinant());
      p.rms = rms_at(iy, ix);
      const double hx = R * std::sqrt(p.c(0, 0)), hy = R * std::sqrt(p.c(1, 1));
      p.x0 = std::max(0L, static_cast<long>(std::floor(x - hx)));
      p.x1 = std::min(nx - 1, static_cast<long>(std::ceil(x + hx)));
      p.y0 = std::max(0L, static_cast<long>(std::floor(y - hy)));
      p.y1 = std::min(ny - 1, static_cast<long>(std::ceil(y + hy)));
      if (x - hx < 0 || y - hy < 0 || x + hx > nx - 1 || y + hy > ny - 1) m.flags |= kForcedEdge;
      const double tr = 0.5 * p.c.trace(), det = p.c.determinant();
      p.reach = std::sqrt(tr + std::sqrt(std::max(0.0, tr * tr - det)));
      p.ok = true;
      m.rms_jy_per_beam = p.rms;
      m.rms_flux_jy = p.rms * p.flux_factor;
      m.upper_limit_jy = opt.limit_snr * m.rms_flux_jy;
    }
  });

  // 2. Blend groups: centres within blend_radius_sigma in the summed covariance.
  std::vector<long> parent(n);
  std::iota(parent.begin(), parent.end(), 0L);
  double reach_max = 0.0;
  for (const Prep& p : prep)
    if (p.ok) reach_max = std::max(reach_max, p.reach);
  if (reach_max > 0.0) {
    const double cell = std::max(1.0, opt.blend_radius_sigma * std::sqrt(2.0) * reach_max);
    std::unordered_map<long long, std::vector<long>> grid;
    auto key = [](long cx, long cy) { return (static_cast<long long>(cx) << 32) ^ static_cast<long long>(cy & 0xffffffff); };
    for (std::size_t i = 0; i < n; ++i)
      if (prep[i].ok)
        grid[key(static_cast<long>(std::floor(prep[i].x / cell)), static_cast<long>(std::floor(prep[i].y / cell)))]
            .push_back(static_cast<long>(i));
    const double b2 = opt.blend_radius_sigma * opt.blend_radius_sigma;
    for (std::size_t i = 0; i < n; ++i) {
      if (!prep[i].ok) continue;
      const long cx = static_cast<long>(std::floor(prep[i].x / cell)), cy = static_cast<long>(std::floor(prep[i].y / cell));
      for (long dy = -1; dy <= 1; ++dy)
        for (long dx = -1; dx <= 1; ++dx) {
          auto it = grid.find(key(cx + dx, cy + dy));
          if (it == grid.end()) continue;
          for (long j : it->second) {
            if (j <= static_cast<long>(i)) continue;
            const Eigen::Vector2d d(prep[j].x - prep[i].x, prep[j].y - prep[i].y);
            if (d.dot((prep[i].c + prep[j].c).inverse() * d) < b2) unite(parent, static_cast<long>(i), j);
          }
        }
    }
  }
  // Groups in order of their smallest member; members in input order.
  std::vector<std::vector<long>> groups;
  {
    std::vector<long> gid(n, -1);
    for (std::size_t i = 0; i < n; ++i) {
      if (!prep[i].ok) continue;
      const long r = find_root(parent, static_cast<long>(i));
      if (gid[r] < 0) {
        gid[r] = static_cast<long>(groups.size());
        groups.emplace_back();
      }
      groups[gid[r]].push_back(static_cast<long>(i));
    }
    // Split blends larger than max_group_size into consecutive chunks.
    const std::size_t cap = static_cast<std::size_t>(std::max(1, opt.max_group_size));
    std::vector<std::vector<long>> split;
    for (auto& g : groups) {
      if (g.size() <= cap) {
        split.push_back(std::move(g));
        continue;
      }
      for (std::size_t s = 0; s < g.size(); s += cap) {
        split.emplace_back(g.begin() + static_cast<long>(s), g.begin() + static_cast<long>(std::min(g.size(), s + cap)));
        for (long k : split.back()) out[k].flags |= kForcedGroupSplit;
      }
    }
    groups.swap(split);
  }

  // 3. Linear weighted least squares per group (amplitudes only).
  const bool shift = opt.max_shift_arcsec > 0.0;
  tbb::parallel_for(tbb::blocked_range<std::size_t>(0, groups.size(), 16), [&](const tbb::blocked_range<std::size_t>& r) {
    std::vector<double> gv, qv;
    std::vector<double> px, py, pv, pw;  // the group's pixels, kept for the shifted fit
    for (std::size_t gi = r.begin(); gi != r.end(); ++gi) {
      const std::vector<long>& mem = groups[gi];
      const int m = static_cast<int>(mem.size());
      Eigen::MatrixXd A = Eigen::MatrixXd::Zero(m, m);
      Eigen::VectorXd b = Eigen::VectorXd::Zero(m);
      gv.assign(static_cast<std::size_t>(m), 0.0);
      qv.assign(static_cast<std::size_t>(m), 0.0);
      std::vector<char> touched_gap(static_cast<std::size_t>(m), 0);
      px.clear();
      py.clear();
      pv.clear();
      pw.clear();
      const double R2 = R * R;
      // Pixels: the union of the members' footprints (q <= R^2), each visited
      // once (by the first member whose footprint holds it). On them every
      // template is evaluated out to 2R (exp(-2 R^2) ~ 1.5e-8 for R = 3: exact
      // for the model in practice), so a long blend chain costs its members'
      // footprints, not its bounding box.
      auto qof = [&](int k, long x, long y) {
        const Prep& p = prep[mem[k]];
        const double dx = x - p.x, dy = y - p.y;
        return p.ci(0, 0) * dx * dx + 2.0 * p.ci(0, 1) * dx * dy + p.ci(1, 1) * dy * dy;
      };
      auto in_box = [&](int k, long x, long y) {
        const Prep& p = prep[mem[k]];
        return x >= p.x0 && x <= p.x1 && y >= p.y0 && y <= p.y1;
      };
      const double R2x4 = 4.0 * R2;
      for (int k0 = 0; k0 < m; ++k0) {
        const Prep& pk0 = prep[mem[k0]];
        for (long y = pk0.y0; y <= pk0.y1; ++y)
          for (long x = pk0.x0; x <= pk0.x1; ++x) {
            if (qof(k0, x, y) > R2) continue;
            bool seen = false;
            for (int j = 0; j < k0 && !seen; ++j) seen = in_box(j, x, y) && qof(j, x, y) <= R2;
            if (seen) continue;
            for (int k = 0; k < m; ++k) {
              const double q = qof(k, x, y);
              qv[k] = q;
              gv[k] = q <= R2x4 ? std::exp(-0.5 * q) : 0.0;
            }
            if (!usable(y, x)) {
              for (int k = 0; k < m; ++k)
                if (qv[k] <= R2) touched_gap[k] = 1;
              continue;
            }
            const double w = 1.0 / (rms_at(y, x) * rms_at(y, x));
            const double v = image(y, x);
            if (shift) {
              px.push_back(static_cast<double>(x));
              py.push_back(static_cast<double>(y));
              pv.push_back(v);
              pw.push_back(w);
            }
            for (int k = 0; k < m; ++k) {
              if (gv[k] == 0.0) continue;
              b(k) += w * gv[k] * v;
              for (int l = 0; l <= k; ++l) A(k, l) += w * gv[k] * gv[l];
            }
          }
      }
      for (int k = 0; k < m; ++k)
        for (int l = 0; l < k; ++l) A(l, k) = A(k, l);
      Eigen::LDLT<Eigen::MatrixXd> ldlt(A);
      const Eigen::VectorXd dvec = ldlt.vectorD();
      const bool singular = ldlt.info() != Eigen::Success || !(dvec.minCoeff() > 1e-10 * dvec.maxCoeff());
      if (singular) {
        for (long k : mem) out[k].flags |= kForcedDegenerate;
        continue;
      }
      const Eigen::VectorXd a = ldlt.solve(b);
      const Eigen::MatrixXd Ai = ldlt.solve(Eigen::MatrixXd::Identity(m, m));
      // Sandwich covariance with the beam-correlated noise (forced.h).
      Eigen::MatrixXd B(m, m);
      for (int k = 0; k < m; ++k)
        for (int l = 0; l <= k; ++l) {
          const Prep& pk = prep[mem[k]];
          const Prep& pl = prep[mem[l]];
          const Eigen::Vector2d d(pk.x - pl.x, pk.y - pl.y);
          B(k, l) = B(l, k) = correlated_overlap(pk.c, pl.c, 0.5 * (pk.cb + pl.cb), d) / (pk.rms * pl.rms);
        }
      Eigen::MatrixXd cov = Ai * B * Ai;
      Eigen::VectorXd amp = a;
      std::vector<Eigen::Vector2d> dpix(static_cast<std::size_t>(m), Eigen::Vector2d::Zero());
      std::vector<Eigen::Matrix2d> dcov(static_cast<std::size_t>(m), Eigen::Matrix2d::Constant(NAN));
      std::vector<std::uint32_t> sflag(static_cast<std::size_t>(m), 0u);
      if (shift) {
        // Bounded refit of amplitudes and the detected members' centres (forced.h).
        std::vector<int> free_idx(static_cast<std::size_t>(m), -1);  // parameter index of dx_k
        int np = m;
        for (int k = 0; k < m; ++k)
          if (a(k) >= opt.detect_snr * prep[mem[k]].rms) {
            free_idx[k] = np;
            np += 2;
          }
        const int npix = static_cast<int>(px.size());
        if (np > m && npix > np) {
          Eigen::VectorXd p0(np), lo(np), hi(np);
          for (int k = 0; k < m; ++k) {
            p0(k) = a(k);
            lo(k) = -std::numeric_limits<double>::infinity();
            hi(k) = std::numeric_limits<double>::infinity();
            if (free_idx[k] < 0) continue;
            const Prep& pk = prep[mem[k]];
            for (int ax = 0; ax < 2; ++ax) {
              // +-max_shift along this pixel axis: its length on the sky is |J e_ax|.
              const double bound = opt.max_shift_arcsec / pk.jac.col(ax).norm();
              p0(free_idx[k] + ax) = 0.0;
              lo(free_idx[k] + ax) = -bound;
              hi(free_idx[k] + ax) = bound;
            }
          }
          const LmFunctor f = [&](const Eigen::VectorXd& p, Eigen::VectorXd& res, Eigen::MatrixXd* jac) {
            res.resize(npix);
            if (jac) jac->setZero(npix, np);
            for (int i = 0; i < npix; ++i) {
              const double sw = std::sqrt(pw[i]);
              double model = 0.0;
              for (int k = 0; k < m; ++k) {
                const Prep& pk = prep[mem[k]];
                double cx = pk.x, cy = pk.y;
                if (free_idx[k] >= 0) {
                  cx += p(free_idx[k]);
                  cy += p(free_idx[k] + 1);
                }
                const double dx = px[i] - cx, dy = py[i] - cy;
                const double ux = pk.ci(0, 0) * dx + pk.ci(0, 1) * dy, uy = pk.ci(1, 0) * dx + pk.ci(1, 1) * dy;
                const double g = std::exp(-0.5 * (dx * ux + dy * uy));
                model += p(k) * g;
                if (jac) {
                  // r = sw (v - m): dr/da = -sw g, dr/dmu = -sw a g C^-1 (x - mu).
                  (*jac)(i, k) = -sw * g;
                  if (free_idx[k] >= 0) {
                    (*jac)(i, free_idx[k]) = -sw * p(k) * g * ux;
                    (*jac)(i, free_idx[k] + 1) = -sw * p(k) * g * uy;
                  }
                }
              }
              res(i) = sw * (pv[i] - model);
            }
            return res.allFinite();
          };
          LevenbergMarquardt lm;
          lm.set_bounds(lo, hi);
          const LmResult fit = lm.solve(f, p0, npix);
          if (!lm_converged(fit.status)) {
            for (int k = 0; k < m; ++k)
              if (free_idx[k] >= 0) sflag[k] |= kForcedShiftFailed;
          } else {
            // Meat J^T R J in closed form (forced.h), whitened by the rms at the centres.
            Eigen::MatrixXd meat = Eigen::MatrixXd::Zero(np, np);
            const Eigen::VectorXd& q = fit.params;
            auto centre = [&](int k) {
              const Prep& pk = prep[mem[k]];
              Eigen::Vector2d c(pk.x, pk.y);
              if (free_idx[k] >= 0) c += Eigen::Vector2d(q(free_idx[k]), q(free_idx[k] + 1));
              return c;
            };
            for (int k = 0; k < m; ++k)
              for (int l = 0; l < m; ++l) {
                const Prep& pk = prep[mem[k]];
                const Prep& pl = prep[mem[l]];
                const Eigen::Vector2d d = centre(k) - centre(l);
                const Eigen::Matrix2d S = pk.c + pl.c + 0.5 * (pk.cb + pl.cb);
                const Eigen::Matrix2d Si = S.inverse();
                const double I = correlated_overlap(pk.c, pl.c, 0.5 * (pk.cb + pl.cb), d) / (pk.rms * pl.rms);
                const Eigen::Vector2d u = Si * d;
                meat(k, l) = I;
                if (free_idx[l] >= 0) meat.block<1, 2>(k, free_idx[l]) = (q(l) * I * u).transpose();
                if (free_idx[k] >= 0) meat.block<2, 1>(free_idx[k], l) = -q(k) * I * u;
                if (free_idx[k] >= 0 && free_idx[l] >= 0)
                  meat.block<2, 2>(free_idx[k], free_idx[l]) = q(k) * q(l) * I * (Si - u * u.transpose());
              }
            Eigen::MatrixXd v;
            if (!lm_sandwich_covariance(fit.jacobian, meat, v)) {
              for (int k = 0; k < m; ++k)
                if (free_idx[k] >= 0) sflag[k] |= kForcedShiftFailed;
            } else {
              amp = q.head(m);
              cov = v.topLeftCorner(m, m);
              for (int k = 0; k < m; ++k) {
                if (free_idx[k] < 0) continue;
                const int j = free_idx[k];
                dpix[k] = Eigen::Vector2d(q(j), q(j + 1));
                dcov[k] = v.block<2, 2>(j, j);
                for (int ax = 0; ax < 2; ++ax)
                  if (std::abs(q(j + ax)) >= hi(j + ax) * (1.0 - 1e-9)) sflag[k] |= kForcedShiftAtBound;
              }
            }
          }
        }
      }
      for (int k = 0; k < m; ++k) {
        ForcedMeasurement& o = out[mem[k]];
        const Prep& p = prep[mem[k]];
        o.group = static_cast<std::int64_t>(mem.front());
        o.group_size = m;
        if (m > 1) o.flags |= kForcedBlended;
        if (touched_gap[k]) o.flags |= kForcedEdge;
        o.peak_jy_per_beam = amp(k);
        o.peak_err_jy_per_beam = std::sqrt(std::max(0.0, cov(k, k)));
        o.flux_jy = amp(k) * p.flux_factor;
        o.flux_err_jy = o.peak_err_jy_per_beam * p.flux_factor;
        o.flux_err_total_jy = std::hypot(o.flux_err_jy, opt.flux_scale_frac * o.flux_jy);
        o.detected = amp(k) >= opt.detect_snr * p.rms;
        if (shift) {
          // Pixel shift -> sky (east, north) [arcsec] with the local Jacobian.
          const Eigen::Vector2d sky = p.jac * dpix[k];
          const Eigen::Matrix2d sc = p.jac * dcov[k] * p.jac.transpose();
          o.x = p.x + dpix[k](0);
          o.y = p.y + dpix[k](1);
          o.shift_east_arcsec = sky(0);
          o.shift_north_arcsec = sky(1);
          if (sc.allFinite()) {
            o.shift_east_err_arcsec = std::sqrt(std::max(0.0, sc(0, 0)));
            o.shift_north_err_arcsec = std::sqrt(std::max(0.0, sc(1, 1)));
          }
          o.flags |= sflag[k];
        }
        if (!o.detected) o.flags |= kForcedNotDetected;
      }
    }
  });
  return out;
}

}  // namespace detail

std::vector<ForcedMeasurement> forced_measure(const ImageF& image, const ImageF& rms,
                                              double rms_scalar, const PixelSky& wcs,
                                              const Beam& beam,
                                              const std::vector<ForcedSource>& sources,
                                              const ForcedOptions& options) {
  return detail::forced_measure_masked(image, rms, rms_scalar, wcs, beam, sources, nullptr, options);
}

}  // namespace skerry
