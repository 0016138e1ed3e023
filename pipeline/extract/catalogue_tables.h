#pragma once
/// The catalogue tables that `skerry extract` writes: components, islands and
/// sources, as `Table`s with our own column names (units in the names where
/// they help), FITS/IAU units, IVOA UCD1+ words (IVOA UCD1+ controlled
/// vocabulary 1.6, REF-VO-02) and a one-line description per column.
///
/// Conventions, stated in every table's meta as well: positions ICRS degrees;
/// position angles east of north; sizes FWHM; S proportional to nu^alpha; pixel
/// columns `*_pix1` are 1-based FITS pixels (bounding boxes inclusive); flags
/// (warnings) and info_bits (information) are the bitmasks of skerry/catalogue.h. Rows are sorted by (island_id,
/// component index), sources by source_id: a total order.
#include <cstdint>
#include <string>
#include <utility>
#include <vector>

#include "skerry/catalogue.h"
#include "skerry/table.h"

namespace skerry {

struct IslandRecord {
  std::int64_t island_id = 0;
  std::int64_t n_components = 0;
  std::int64_t n_pixels = 0;
  double s_pix_jy = 0.0;        ///< pixel sum of (image - background) / beam area in pixels
  double s_pix_err_jy = 0.0;    ///< its error (docs/CONVENTIONS.md "Noise", correlated pixels)
  double peak_jy_per_beam = 0.0;  ///< largest (image - background)
  double peak_snr = 0.0;          ///< island SNR: largest (I - B)/sigma
  double peak_x_pix = 0.0, peak_y_pix = 0.0;  ///< 0-based (written 1-based)
  double peak_ra_deg = 0.0, peak_dec_deg = 0.0;
  long x0 = 0, y0 = 0, x1 = 0, y1 = 0;        ///< 0-based inclusive bbox (written 1-based)
  double residual_rms_jy_per_beam = 0.0;
  double mean_rms_jy_per_beam = 0.0;
  std::uint32_t flags = 0;
};

/// Key/value provenance put into every table's meta (and FITS headers):
/// tool, version, revision, input file, image frame, beam, conventions, ...
using Provenance = std::vector<std::pair<std::string, std::string>>;

/// The convention statements every table carries (keys "convention_*", and the
/// bit names "flag_bit<k>" and "info_bit<k>").
Provenance convention_meta();

/// The UCD1+ band word for a frequency ("em.radio.750-1500MHz"); "" when unknown.
std::string radio_band_ucd(double freq_hz);

/// `freq_hz` (NaN when unknown) picks the band word of the flux-density UCDs.
Table make_component_table(const std::vector<CatalogueComponent>& rows, const Provenance& meta,
                           double freq_hz);
Table make_island_table(const std::vector<IslandRecord>& rows, const Provenance& meta,
                        double freq_hz);
/// The designation column is designation(designation_prefix, ra, dec).
Table make_source_table(const std::vector<CatalogueSource>& sources, const Provenance& meta,
                        double freq_hz, const std::string& designation_prefix);

/// Sorts component records by (island_id, component): the total order of rows.
void sort_components(std::vector<CatalogueComponent>& rows);

/// Designation in IAU style from the position, truncated not rounded:
/// PREFIX JHHMMSS.s+DDMMSS (docs/CONVENTIONS.md "Catalogues and names").
std::string designation(const std::string& prefix, double ra_deg, double dec_deg);

}  // namespace skerry
