// Friends-of-friends grouping of components into sources (rule in catalogue.h).
#include <algorithm>
#include <cmath>
#include <numeric>
#include <unordered_map>

#include "skerry/catalogue.h"
#include "skerry/constants.h"
#include "skerry/sky.h"

namespace skerry {

const char* structure_name(SourceStructure m) {
  switch (m) {
    case SourceStructure::Compact: return "compact";
    case SourceStructure::Composite: return "composite";
    case SourceStructure::Diffuse: return "diffuse";
  }
  return "?";
}

namespace {

struct UnionFind {
  std::vector<std::size_t> parent;
  explicit UnionFind(std::size_t n) : parent(n) { std::iota(parent.begin(), parent.end(), 0); }
  std::size_t find(std::size_t i) {
    while (parent[i] != i) {
      parent[i] = parent[parent[i]];
      i = parent[i];
    }
    return i;
  }
  // The smaller index becomes the root: the result does not depend on the order of unions.
  void unite(std::size_t a, std::size_t b) {
    a = find(a);
    b = find(b);
    if (a == b) return;
    if (a < b) parent[b] = a; else parent[a] = b;
  }
};

/// Half-width of an FWHM ellipse projected on a direction at position angle
/// `dir_pa_deg` (support function of the half-FWHM ellipse):
///   h = 1/2 sqrt(M^2 cos^2 d + m^2 sin^2 d),  d = dir - PA   [same unit as M, m]
double half_width(const Ellipse& e, double dir_pa_deg) {
  const double d = (dir_pa_deg - e.pa_deg) * kDegToRad;
  const double c = std::cos(d), s = std::sin(d);
  return 0.5 * std::sqrt(e.maj * e.maj * c * c + e.min * e.min * s * s);
}

}  // namespace

Ellipse deconvolved_extent_arcsec(const CatalogueComponent& c) {
  if (c.deconv_maj_upper_limit) return {0.0, 0.0, 0.0};
  return {c.deconv_arcsec.maj, c.deconv_min_upper_limit ? 0.0 : c.deconv_arcsec.min, c.deconv_arcsec.pa_deg};
}

namespace {

bool finite_pos(const CatalogueComponent& c) {
  return std::isfinite(c.ra_deg) && std::isfinite(c.dec_deg);
}

}  // namespace

namespace {

// Pixel flux, centroid and emission LAS of a source from its islands (rules in
// skerry/catalogue.h). Islands without pixel sums leave the values NaN.
void emission_measures(CatalogueSource& s,
                       const std::unordered_map<std::int64_t, const CatalogueIsland*>& by_id,
                       const Beam& beam, const GroupingOptions& opt) {
  double data = 0.0, resid = 0.0, var = 0.0, wsum = 0.0, peak = -INFINITY, level = INFINITY;
  double pix = 0.0;
  bool sums_ok = true;
  Eigen::Vector3d v = Eigen::Vector3d::Zero();
  std::vector<std::pair<double, double>> pts;
  for (std::int64_t id : s.islands) {
    const auto it = by_id.find(id);
    if (it == by_id.end()) {
      sums_ok = false;
      continue;
    }
    const CatalogueIsland& is = *it->second;
    if (std::isfinite(is.aperture_data_jy) && std::isfinite(is.aperture_model_jy) &&
        std::isfinite(is.aperture_err_jy)) {
      data += is.aperture_data_jy;
      resid += is.aperture_data_jy - is.aperture_model_jy;
      var += is.aperture_err_jy * is.aperture_err_jy;
    } else {
      sums_ok = false;
    }
    if (is.centroid_weight_jy > 0.0 && std::isfinite(is.centroid_ra_deg) && std::isfinite(is.centroid_dec_deg)) {
      v += is.centroid_weight_jy * unit_vector(is.centroid_ra_deg, is.centroid_dec_deg);
      wsum += is.centroid_weight_jy;
    }
    for (const auto& p : is.extent_points) pts.push_back(p);
    if (std::isfinite(is.peak_jy_per_beam)) peak = std::max(peak, is.peak_jy_per_beam);
    if (std::isfinite(is.contour_jy_per_beam)) level = std::min(level, is.contour_jy_per_beam);
    pix = std::max(pix, is.pixel_arcsec);
  }
  if (sums_ok && !s.islands.empty()) {
    s.s_int_pix_jy = data;
    s.s_int_pix_err_jy = std::sqrt(var);
    s.s_int_from_pixels = var > 0.0 && std::abs(resid) >= opt.residual_flux_snr * std::sqrt(var);
  }
  if (wsum > 0.0 && v.norm() > 0.0) radec_of_vector(v, s.centroid_ra_deg, s.centroid_dec_deg);
  if (!pts.empty() && beam.valid()) {
    double d = 0.0;
    for (std::size_t a = 0; a < pts.size(); ++a)
      for (std::size_t b = a + 1; b < pts.size(); ++b)
        d = std::max(d, separation_deg(pts[a].first, pts[a].second, pts[b].first, pts[b].second) * kDegToArcsec);
    d += pix;
    const double d0 = (peak > level && level > 0.0)
                          ? beam.maj_arcsec * std::sqrt(std::log(peak / level) / std::log(2.0))
                          : 0.0;
    s.las_emission_arcsec = d > d0 ? std::sqrt(d * d - d0 * d0) : 0.0;
  }
}

}  // namespace

std::vector<CatalogueSource> group_sources(const std::vector<CatalogueComponent>& comps,
                                           const std::vector<CatalogueIsland>& islands,
                                           const Beam& beam, const GroupingOptions& opt) {
  const std::size_t n = comps.size();
  UnionFind uf(n);
  // Rule 1: components of one island.
  {
    std::unordered_map<std::int64_t, std::size_t> first;
    for (std::size_t i = 0; i < n; ++i) {
      auto [it, fresh] = first.emplace(comps[i].island_id, i);
      if (!fresh) uf.unite(it->second, i);
    }
  }
  // Rules 2-3: friends across islands.
  const double gap_arcsec = opt.link_gap_beams * beam.maj_arcsec;
  if (opt.link_gap_beams >= 0.0 && beam.valid() && n > 1) {
    auto linked = [&](std::size_t i, std::size_t j) {
      const auto& a = comps[i];
      const auto& b = comps[j];
      if (a.island_id == b.island_id) return false;  // already joined
      if (opt.link_max_flux_ratio > 0.0) {
        const double lo = std::min(a.s_int_jy, b.s_int_jy), hi = std::max(a.s_int_jy, b.s_int_jy);
        if (!(lo > 0.0) || !(hi <= opt.link_max_flux_ratio * lo)) return false;
      }
      const double sep = separation_deg(a.ra_deg, a.dec_deg, b.ra_deg, b.dec_deg) * kDegToArcsec;
      const double pa_ab = position_angle_deg(a.ra_deg, a.dec_deg, b.ra_deg, b.dec_deg);
      const double pa_ba = position_angle_deg(b.ra_deg, b.dec_deg, a.ra_deg, a.dec_deg);
      const double gap = sep - half_width(a.fitted_arcsec, pa_ab) - half_width(b.fitted_arcsec, pa_ba);
      return gap <= gap_arcsec;
    };
    // Candidate pairs from a grid on unit vectors. A pair can only link when
    // sep <= rho_i + rho_j with reach rho = gap/2 + maj/2 (h <= maj/2); the
    // chord |u_i - u_j| <= sep [rad], so the cubes u +- rho overlap.
    std::vector<double> rho(n);
    std::vector<double> sorted_rho;
    for (std::size_t i = 0; i < n; ++i) {
      const double m = std::isfinite(comps[i].fitted_arcsec.maj) ? comps[i].fitted_arcsec.maj : 0.0;
      rho[i] = (0.5 * gap_arcsec + 0.5 * m) * kArcsecToRad * (1.0 + 1e-9);
      if (finite_pos(comps[i])) sorted_rho.push_back(rho[i]);
    }
    if (!sorted_rho.empty()) {
      std::sort(sorted_rho.begin(), sorted_rho.end());
      const double cell = std::max(2.0 * sorted_rho[(sorted_rho.size() * 9) / 10], 1e-12);
      std::unordered_map<long long, std::vector<std::size_t>> grid;
      std::vector<std::size_t> oversized;
      auto cell_index = [&](double v) { return static_cast<long long>(std::floor(v / cell)); };
      auto key = [](long long i, long long j, long long k) {
        return ((i & 0x1fffff) << 42) | ((j & 0x1fffff) << 21) | (k & 0x1fffff);
      };
      for (std::size_t i = 0; i < n; ++i) {
        if (!finite_pos(comps[i])) continue;
        const Eigen::Vector3d u = unit_vector(comps[i].ra_deg, comps[i].dec_deg);
        long long lo[3], hi[3];
        double cells = 1.0;
        for (int d = 0; d < 3; ++d) {
          lo[d] = cell_index(u(d) - rho[i]);
          hi[d] = cell_index(u(d) + rho[i]);
          cells *= static_cast<double>(hi[d] - lo[d] + 1);
        }
        if (cells > 512.0) { oversized.push_back(i); continue; }
        for (long long a = lo[0]; a <= hi[0]; ++a)
          for (long long b = lo[1]; b <= hi[1]; ++b)
            for (long long c = lo[2]; c <= hi[2]; ++c) grid[key(a, b, c)].push_back(i);
      }
      for (const auto& [k, members] : grid) {
        for (std::size_t p = 0; p < members.size(); ++p)
          for (std::size_t q = p + 1; q < members.size(); ++q) {
            const std::size_t i = members[p], j = members[q];
            if (uf.find(i) == uf.find(j)) continue;
            if (linked(i, j)) uf.unite(i, j);
          }
      }
      for (std::size_t i : oversized)
        for (std::size_t j = 0; j < n; ++j)
          if (j != i && finite_pos(comps[j]) && uf.find(i) != uf.find(j) && linked(i, j)) uf.unite(i, j);
    }
  }

  // Collect: source order = order of each set's smallest component index.
  std::unordered_map<std::int64_t, const CatalogueIsland*> island_by_id;
  for (const auto& isl : islands) island_by_id[isl.id] = &isl;
  auto island_diffuse = [&](std::int64_t id) {
    auto it = island_by_id.find(id);
    return it != island_by_id.end() && island_is_diffuse(*it->second, opt);
  };

  std::vector<std::int64_t> source_of_root(n, 0);
  std::vector<CatalogueSource> out;
  for (std::size_t i = 0; i < n; ++i) {
    const std::size_t r = uf.find(i);
    if (source_of_root[r] == 0) {
      out.emplace_back();
      out.back().id = static_cast<std::int64_t>(out.size());
      source_of_root[r] = out.back().id;
    }
    out[source_of_root[r] - 1].components.push_back(i);
  }

  for (auto& s : out) {
    double w_sum = 0.0;
    bool all_nonpositive = true;
    for (std::size_t i : s.components)
      if (comps[i].s_int_jy > 0.0) all_nonpositive = false;
    Eigen::Vector3d v = Eigen::Vector3d::Zero();
    double var_ra = 0.0, var_dec = 0.0;
    s.s_int_jy = 0.0;
    double var_s = 0.0;
    s.s_peak_max_jy_per_beam = -INFINITY;
    std::uint32_t flags = 0, info = 0;
    bool any_diffuse = false;
    for (std::size_t i : s.components) {
      const auto& c = comps[i];
      s.islands.push_back(c.island_id);
      const double w = all_nonpositive ? 1.0 : std::max(0.0, c.s_int_jy);
      if (finite_pos(c)) {
        v += w * unit_vector(c.ra_deg, c.dec_deg);
        w_sum += w;
        var_ra += w * w * c.ra_err_arcsec * c.ra_err_arcsec;
        var_dec += w * w * c.dec_err_arcsec * c.dec_err_arcsec;
      }
      s.s_int_jy += c.s_int_jy;
      var_s += c.s_int_err_jy * c.s_int_err_jy;
      s.s_peak_max_jy_per_beam = std::max(s.s_peak_max_jy_per_beam, c.s_peak_jy_per_beam);
      flags |= c.flags;
      info |= c.info_bits & ~kInfoUnresolved;
      if (island_diffuse(c.island_id)) any_diffuse = true;
    }
    std::sort(s.islands.begin(), s.islands.end());
    s.islands.erase(std::unique(s.islands.begin(), s.islands.end()), s.islands.end());
    if (w_sum > 0.0 && v.norm() > 0.0) {
      radec_of_vector(v, s.ra_deg, s.dec_deg);
      s.ra_err_arcsec = std::sqrt(var_ra) / w_sum;
      s.dec_err_arcsec = std::sqrt(var_dec) / w_sum;
    } else {
      s.ra_deg = s.dec_deg = s.ra_err_arcsec = s.dec_err_arcsec = NAN;
    }
    s.s_int_err_jy = std::sqrt(var_s);

    // Largest angular size from deconvolved extents.
    double las = 0.0;
    for (std::size_t p = 0; p < s.components.size(); ++p) {
      const auto& a = comps[s.components[p]];
      const Ellipse ea = deconvolved_extent_arcsec(a);
      if (std::isfinite(ea.maj)) las = std::max(las, ea.maj);
      for (std::size_t q = p + 1; q < s.components.size(); ++q) {
        const auto& b = comps[s.components[q]];
        if (!finite_pos(a) || !finite_pos(b)) continue;
        const double sep = separation_deg(a.ra_deg, a.dec_deg, b.ra_deg, b.dec_deg) * kDegToArcsec;
        const double hab = half_width(ea, position_angle_deg(a.ra_deg, a.dec_deg, b.ra_deg, b.dec_deg));
        const double hba = half_width(deconvolved_extent_arcsec(b),
                                      position_angle_deg(b.ra_deg, b.dec_deg, a.ra_deg, a.dec_deg));
        const double ext = sep + (std::isfinite(hab) ? hab : 0.0) + (std::isfinite(hba) ? hba : 0.0);
        las = std::max(las, ext);
      }
    }
    s.las_arcsec = las;

    s.s_int_model_jy = s.s_int_jy;
    s.s_int_model_err_jy = s.s_int_err_jy;
    emission_measures(s, island_by_id, beam, opt);
    if (s.s_int_from_pixels) {
      s.s_int_jy = s.s_int_pix_jy;
      s.s_int_err_jy = s.s_int_pix_err_jy;
    }

    if (s.islands.size() > 1) info |= kInfoMultiIsland;
    if (any_diffuse) flags |= kFlagDiffuse;
    if (s.components.size() == 1 && (comps[s.components[0]].info_bits & kInfoUnresolved))
      info |= kInfoUnresolved;
    s.flags = flags;
    s.info_bits = info;
    s.structure = any_diffuse ? SourceStructure::Diffuse
                   : s.components.size() > 1 ? SourceStructure::Composite
                                             : SourceStructure::Compact;
  }
  return out;
}

}  // namespace skerry
