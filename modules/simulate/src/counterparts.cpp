// Counterpart catalogues for likelihood-ratio tests and the demo; see
// skerry/simulate.h (draw_counterparts) for the model.
#include <algorithm>
#include <cmath>
#include <numeric>
#include <stdexcept>
#include <string>

#include "skerry/constants.h"
#include "skerry/simulate.h"
#include "skerry/sky.h"
#include "stream.h"

namespace skerry::sim {

namespace {

void require(bool ok, const std::string& what) {
  if (!ok) throw std::invalid_argument(what);
}

void check(const CounterpartOptions& o) {
  require(o.density_deg2 >= 0 && std::isfinite(o.density_deg2), "density_deg2 must be >= 0");
  require(o.mag_min < o.mag_max && std::isfinite(o.mag_min) && std::isfinite(o.mag_max), "mag_min must be < mag_max");
  require(std::isfinite(o.count_slope) && o.count_slope != 0.0, "count_slope must be non-zero");
  require(o.fraction >= 0 && o.fraction <= 1, "fraction must lie in [0, 1]");
  require(std::isfinite(o.mag_mean) && o.mag_sigma > 0 && std::isfinite(o.mag_sigma), "mag_sigma must be > 0");
  require(o.mag_mean + 5 * o.mag_sigma > o.mag_min && o.mag_mean - 5 * o.mag_sigma < o.mag_max,
          "mag_mean lies more than 5 mag_sigma outside [mag_min, mag_max]");
  require(o.err_min_arcsec >= 0 && o.err_min_arcsec <= o.err_max_arcsec && std::isfinite(o.err_max_arcsec),
          "err_min_arcsec must lie in [0, err_max_arcsec]");
}

/// Box |Dec - Dec0| <= h, |RA - RA0| cos Dec0 <= h: uniform on the sphere by
/// drawing RA uniform and sin(Dec) uniform (equal-area).
struct Box {
  double ra0, half_ra, s0, s1;
  Box(double ra_c, double dec_c, double h) {
    require(h > 0 && h < 30, "half_size_deg must lie in (0, 30)");
    require(std::abs(dec_c) + h < 89.0, "the field must not reach a pole");
    ra0 = ra_c;
    half_ra = h / std::cos(dec_c * kDegToRad);
    s0 = std::sin((dec_c - h) * kDegToRad);
    s1 = std::sin((dec_c + h) * kDegToRad);
  }
  double area_deg2() const { return 2.0 * half_ra * kDegToRad * (s1 - s0) * kRadToDeg * kRadToDeg; }
  void draw(detail::Stream& r, double& ra, double& dec) const {
    ra = ra0 + half_ra * (2.0 * r.uniform() - 1.0);
    ra = std::fmod(ra + 720.0, 360.0);
    dec = std::asin(s0 + (s1 - s0) * r.uniform()) * kRadToDeg;
  }
};

}  // namespace

CounterpartCatalogue draw_counterparts(const std::vector<double>& radio_ra, const std::vector<double>& radio_dec,
                                       double centre_ra, double centre_dec, double half_size_deg,
                                       const CounterpartOptions& o, std::uint64_t seed) {
  check(o);
  require(radio_ra.size() == radio_dec.size(), "radio RA and Dec differ in length");
  const Box box(centre_ra, centre_dec, half_size_deg);
  CounterpartCatalogue c;
  auto add = [&](double ra, double dec, double err, double mag, std::int64_t idx) {
    c.ra_deg.push_back(ra);
    c.dec_deg.push_back(dec);
    c.err_arcsec.push_back(err);
    c.mag.push_back(mag);
    c.radio_index.push_back(idx);
  };
  // Background: N = round(density x area), magnitudes by inverting the CDF of
  // dN/dm ~ 10^(k m): m = log10(10^(k m0) + u (10^(k m1) - 10^(k m0))) / k.
  const auto n_bg = static_cast<std::size_t>(std::llround(o.density_deg2 * box.area_deg2()));
  require(n_bg <= 200000000, "density_deg2 x area exceeds 2e8 objects");
  const double k = o.count_slope, p0 = std::pow(10.0, k * o.mag_min), p1 = std::pow(10.0, k * o.mag_max);
  for (std::size_t i = 0; i < n_bg; ++i) {
    detail::Stream r(seed, detail::kPurposeOpticalBackground, i);
    double ra, dec;
    box.draw(r, ra, dec);
    const double mag = std::log10(p0 + r.uniform() * (p1 - p0)) / k;
    const double err = o.err_min_arcsec + (o.err_max_arcsec - o.err_min_arcsec) * r.uniform();
    add(ra, dec, err, mag, -1);
  }
  // Counterparts at the true radio positions, displaced by their own error.
  for (std::size_t i = 0; i < radio_ra.size(); ++i) {
    detail::Stream r(seed, detail::kPurposeCounterpart, i);
    if (!(r.uniform() < o.fraction)) continue;
    double mag = 0;
    do mag = o.mag_mean + o.mag_sigma * r.normal();
    while (mag < o.mag_min || mag > o.mag_max);
    const double err = o.err_min_arcsec + (o.err_max_arcsec - o.err_min_arcsec) * r.uniform();
    double g1, g2, ra, dec;
    r.normal_pair(g1, g2);
    gnomonic_inverse(radio_ra[i], radio_dec[i], err * g1 * kArcsecToRad, err * g2 * kArcsecToRad, ra, dec);
    add(ra, dec, err, mag, static_cast<std::int64_t>(i));
  }
  // Sort by (RA, Dec, magnitude): a total order that hides which rows are true.
  std::vector<std::size_t> ord(c.ra_deg.size());
  std::iota(ord.begin(), ord.end(), std::size_t{0});
  std::sort(ord.begin(), ord.end(), [&](std::size_t x, std::size_t y) {
    if (c.ra_deg[x] != c.ra_deg[y]) return c.ra_deg[x] < c.ra_deg[y];
    if (c.dec_deg[x] != c.dec_deg[y]) return c.dec_deg[x] < c.dec_deg[y];
    return x < y;
  });
  CounterpartCatalogue s;
  for (std::size_t q : ord) {
    s.ra_deg.push_back(c.ra_deg[q]);
    s.dec_deg.push_back(c.dec_deg[q]);
    s.err_arcsec.push_back(c.err_arcsec[q]);
    s.mag.push_back(c.mag[q]);
    s.radio_index.push_back(c.radio_index[q]);
  }
  return s;
}

RadioOpticalField draw_radio_optical_field(std::size_t n_radio, double centre_ra, double centre_dec,
                                           double half_size_deg, double radio_margin_deg, double err_min,
                                           double err_max, const CounterpartOptions& o, std::uint64_t seed) {
  require(radio_margin_deg >= 0 && radio_margin_deg < half_size_deg, "radio_margin_deg must lie in [0, half_size_deg)");
  require(err_min > 0 && err_min <= err_max && std::isfinite(err_max), "radio errors must satisfy 0 < min <= max");
  const Box inner(centre_ra, centre_dec, half_size_deg - radio_margin_deg);
  std::vector<double> tra(n_radio), tdec(n_radio);
  RadioOpticalField f;
  f.radio_ra_deg.resize(n_radio);
  f.radio_dec_deg.resize(n_radio);
  f.radio_err_arcsec.resize(n_radio);
  for (std::size_t i = 0; i < n_radio; ++i) {
    detail::Stream r(seed, detail::kPurposeRadioField, i);
    inner.draw(r, tra[i], tdec[i]);
    const double e = err_min + (err_max - err_min) * r.uniform();
    double g1, g2;
    r.normal_pair(g1, g2);
    gnomonic_inverse(tra[i], tdec[i], e * g1 * kArcsecToRad, e * g2 * kArcsecToRad, f.radio_ra_deg[i],
                     f.radio_dec_deg[i]);
    f.radio_err_arcsec[i] = e;
  }
  f.optical = draw_counterparts(tra, tdec, centre_ra, centre_dec, half_size_deg, o, seed);
  f.true_counterpart.assign(n_radio, -1);
  for (std::size_t j = 0; j < f.optical.radio_index.size(); ++j)
    if (f.optical.radio_index[j] >= 0) f.true_counterpart[static_cast<std::size_t>(f.optical.radio_index[j])] = static_cast<std::int64_t>(j);
  return f;
}

Table counterpart_table(const CounterpartCatalogue& c, const std::vector<std::int64_t>& ids) {
  Table t;
  t.name = "counterparts";
  std::vector<std::int64_t> truth(c.radio_index.size(), -1);
  for (std::size_t j = 0; j < truth.size(); ++j)
    if (c.radio_index[j] >= 0) truth[j] = ids.at(static_cast<std::size_t>(c.radio_index[j]));
  t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "Right ascension (ICRS)", c.ra_deg);
  t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "Declination (ICRS)", c.dec_deg);
  t.add_f64("ra_err_arcsec", "arcsec", "stat.error;pos.eq.ra", "1-sigma error of RA cos(Dec)", c.err_arcsec);
  t.add_f64("dec_err_arcsec", "arcsec", "stat.error;pos.eq.dec", "1-sigma error of Dec", c.err_arcsec);
  t.add_f64("mag", "mag", "phot.mag", "Magnitude (simulated optical band)", c.mag);
  t.add_i64("true_source_id", "", "meta.id.cross",
            "Simulation truth: id of the radio source this object is the counterpart of; -1 = background", truth);
  return t;
}

}  // namespace skerry::sim
