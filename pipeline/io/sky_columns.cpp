// Sky positions from catalogue tables (sky_columns.h).
#include "io/sky_columns.h"

#include <erfa.h>
#include <erfam.h>

#include <cctype>
#include <charconv>
#include <cmath>
#include <sstream>

#include "app/errors.h"

namespace skerry {

namespace {

std::string lower(std::string s) {
  for (auto& c : s) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return s;
}

}  // namespace

/// Column chosen by option, else by UCD (exact, in order), else by name
/// (case-insensitive, in order). Empty string when none.
const Column* find_column(const Table& t, const std::string& file, const std::string& option_value,
                          const std::string& option_name, const std::vector<std::string>& ucds,
                          const std::vector<std::string>& names) {
  if (!option_value.empty()) {
    const Column* c = t.find(option_value);
    if (!c) throw InputError(file, "no column '" + option_value + "' (given by --" + option_name + ")");
    return c;
  }
  for (const auto& u : ucds)
    for (const auto& c : t.columns())
      if (lower(c.ucd) == u) return &c;
  for (const auto& n : names)
    for (const auto& c : t.columns())
      if (lower(c.name) == n) return &c;
  return nullptr;
}

/// Sexagesimal "hh:mm:ss.s", "hh mm ss.s", "12h30m00.5s", "-38d36m00s" or
/// decimal text. `hours` = RA (the first field is in hours). Returns degrees or
/// false when the text is not a number of that form.
bool parse_angle_text(const std::string& s, bool hours, double& deg) {
  std::string t;
  for (char c : s) {
    const char l = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
    t += (l == ':' || l == 'h' || l == 'd' || l == 'm' || l == 's' || l == '\'' || l == '"') ? ' ' : c;
  }
  std::istringstream in(t);
  std::vector<std::string> parts;
  for (std::string p; in >> p;) parts.push_back(p);
  if (parts.empty() || parts.size() > 3) return false;
  bool neg = false;
  if (parts[0][0] == '-' || parts[0][0] == '+') {
    neg = parts[0][0] == '-';
    parts[0] = parts[0].substr(1);
    if (parts[0].empty()) return false;
  }
  double v[3] = {0, 0, 0};
  for (std::size_t i = 0; i < parts.size(); ++i) {
    const char* b = parts[i].data();
    const char* e = b + parts[i].size();
    auto r = std::from_chars(b, e, v[i]);
    if (r.ec != std::errc() || r.ptr != e || !std::isfinite(v[i]) || v[i] < 0) return false;
    if (i > 0 && v[i] >= 60.0) return false;
  }
  if (parts.size() == 1) {
    // Plain decimal: degrees (both coordinates), as in most tables.
    deg = neg ? -v[0] : v[0];
    return true;
  }
  double x = v[0] + v[1] / 60.0 + v[2] / 3600.0;
  if (hours) x *= 15.0;
  deg = neg ? -x : x;
  return true;
}

/// Factor from a column's unit to degrees (angles) or arcsec (errors).
double angle_unit_factor(const Column& c, const std::string& file, bool to_arcsec) {
  const std::string u = lower(c.unit);
  double deg_per_unit;
  if (u.empty() || u == "deg" || u == "degree" || u == "degrees") deg_per_unit = to_arcsec ? 1.0 / 3600.0 : 1.0;
  else if (u == "arcsec" || u == "\"") deg_per_unit = 1.0 / 3600.0;
  else if (u == "arcmin" || u == "'") deg_per_unit = 1.0 / 60.0;
  else if (u == "mas") deg_per_unit = 1.0 / 3.6e6;
  else if (u == "rad") deg_per_unit = 180.0 / 3.14159265358979323846;
  else if (u == "h" || u == "hour" || u == "hourangle") deg_per_unit = 15.0;
  else throw InputError(file, "column '" + c.name + "': unit '" + c.unit + "' is not an angle unit");
  // Errors without a unit are taken as arcsec; positions without one as degrees.
  if (to_arcsec && u.empty()) return 1.0;
  return to_arcsec ? deg_per_unit * 3600.0 : deg_per_unit;
}

std::vector<double> angle_values(const Column& c, const std::string& file, bool hours) {
  std::vector<double> v(c.size());
  switch (c.type) {
    case ColumnType::Float64:
    case ColumnType::Int64: {
      const double f = angle_unit_factor(c, file, false);
      for (std::size_t i = 0; i < v.size(); ++i)
        v[i] = f * (c.type == ColumnType::Float64 ? c.f64[i] : static_cast<double>(c.i64[i]));
      break;
    }
    case ColumnType::Text:
      for (std::size_t i = 0; i < v.size(); ++i) {
        const std::string& s = c.text[i];
        if (s.find_first_not_of(" \t") == std::string::npos) {
          v[i] = std::nan("");
          continue;
        }
        if (!parse_angle_text(s, hours, v[i]))
          throw InputError(file, "row " + std::to_string(i + 1) + ", column '" + c.name + "': '" + s.substr(0, 40) +
                                     "' is not an angle (degrees or sexagesimal)");
      }
      break;
  }
  return v;
}

std::vector<double> numeric_values(const Column& c, const std::string& file) {
  std::vector<double> v(c.size());
  if (c.type == ColumnType::Text) {
    for (std::size_t i = 0; i < v.size(); ++i) {
      const std::string& s = c.text[i];
      if (s.find_first_not_of(" \t") == std::string::npos) {
        v[i] = std::nan("");
        continue;
      }
      const char* b = s.data();
      const char* e = b + s.size();
      while (b < e && *b == ' ') ++b;
      while (e > b && e[-1] == ' ') --e;
      auto r = std::from_chars(b, e, v[i]);
      if (r.ec != std::errc() || r.ptr != e)
        throw InputError(file, "row " + std::to_string(i + 1) + ", column '" + c.name + "': '" + s.substr(0, 40) +
                                   "' is not a number");
    }
  } else {
    for (std::size_t i = 0; i < v.size(); ++i)
      v[i] = c.type == ColumnType::Float64 ? c.f64[i] : static_cast<double>(c.i64[i]);
  }
  return v;
}

CataloguePositions read_catalogue_positions(const Table& t, const std::string& path, const PositionColumnOptions& o) {
  CataloguePositions out;
  std::string frame = lower(o.frame);
  if (frame != "auto" && frame != "icrs" && frame != "galactic")
    throw UsageError("--" + o.frame_option + " = " + o.frame + " breaks 'auto, icrs or galactic'");
  const std::vector<std::string> ra_ucd{"pos.eq.ra;meta.main", "pos.eq.ra"};
  const std::vector<std::string> dec_ucd{"pos.eq.dec;meta.main", "pos.eq.dec"};
  const std::vector<std::string> ra_names{"ra_deg", "ra", "raj2000", "ra_icrs", "radeg", "ra_j2000", "_raj2000", "alpha"};
  const std::vector<std::string> dec_names{"dec_deg", "dec", "dej2000", "decj2000", "de_icrs", "dec_icrs", "dedeg", "decdeg", "dec_j2000", "_dej2000", "delta"};
  const std::vector<std::string> l_ucd{"pos.galactic.lon;meta.main", "pos.galactic.lon"};
  const std::vector<std::string> b_ucd{"pos.galactic.lat;meta.main", "pos.galactic.lat"};
  const std::vector<std::string> l_names{"glon", "glon_deg", "l", "gal_lon", "lii"};
  const std::vector<std::string> b_names{"glat", "glat_deg", "b", "gal_lat", "bii"};
  const Column* ra = nullptr;
  const Column* dec = nullptr;
  auto try_eq = [&] {
    ra = find_column(t, path, o.ra, o.ra_option, ra_ucd, ra_names);
    dec = find_column(t, path, o.dec, o.dec_option, dec_ucd, dec_names);
  };
  auto try_gal = [&] {
    ra = find_column(t, path, o.ra, o.ra_option, l_ucd, l_names);
    dec = find_column(t, path, o.dec, o.dec_option, b_ucd, b_names);
  };
  if (frame == "icrs") try_eq();
  else if (frame == "galactic") try_gal();
  else {
    try_eq();
    frame = "icrs";
    if (!ra || !dec) {
      try_gal();
      frame = "galactic";
    }
  }
  if (!ra || !dec)
    throw InputError(path, std::string("no ") + (!ra ? "RA (or Galactic longitude)" : "Dec (or Galactic latitude)") +
                               " column found; name it with --" + (!ra ? o.ra_option : o.dec_option) +
                               " (looked for UCD pos.eq.ra/pos.eq.dec and names like ra_deg, ra, RAJ2000)");
  out.ra_col = ra->name;
  out.dec_col = dec->name;
  out.frame = frame;
  const bool hours = frame == "icrs";
  std::vector<double> lon = angle_values(*ra, path, hours);
  std::vector<double> lat = angle_values(*dec, path, false);
  const std::size_t n = t.rows();
  for (std::size_t i = 0; i < n; ++i) {
    if (std::isnan(lon[i]) || std::isnan(lat[i])) {
      ++out.no_position;
      continue;
    }
    if (!std::isfinite(lon[i]))
      throw InputError(path, "row " + std::to_string(i + 1) + ", column '" + ra->name + "': longitude is not finite");
    if (!(lat[i] >= -90.0 && lat[i] <= 90.0))
      throw InputError(path, "row " + std::to_string(i + 1) + ", column '" + dec->name + "': latitude " +
                                 std::to_string(lat[i]) + " deg lies outside [-90, 90]");
  }
  if (frame == "galactic") {
    // Galactic -> ICRS with ERFA eraG2icrs (IAU SOFA; Hipparcos frame definition).
    for (std::size_t i = 0; i < n; ++i) {
      if (std::isnan(lon[i]) || std::isnan(lat[i])) continue;
      double rr, dd;
      eraG2icrs(lon[i] * ERFA_DD2R, lat[i] * ERFA_DD2R, &rr, &dd);
      lon[i] = rr * ERFA_DR2D;
      lat[i] = dd * ERFA_DR2D;
    }
  }
  out.ra_deg = std::move(lon);
  out.dec_deg = std::move(lat);
  return out;
}

}  // namespace skerry
