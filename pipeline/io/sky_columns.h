#pragma once
/// Sky positions from catalogue tables: the one place that finds the position
/// columns of a user's table (by option, by IVOA UCD, by common name), reads
/// decimal or sexagesimal angles with their units, and turns Galactic
/// positions into ICRS. `skerry match` and `skerry stack` read positions here.
#include <string>
#include <vector>

#include "skerry/table.h"

namespace skerry {

/// Column chosen by option, else by UCD (exact, in order, case-insensitive),
/// else by name (case-insensitive, in order). nullptr when none. Throws
/// InputError naming `file` when `option_value` names a column that is absent
/// (the message names the option --`option_name`).
const Column* find_column(const Table& t, const std::string& file, const std::string& option_value,
                          const std::string& option_name, const std::vector<std::string>& ucds,
                          const std::vector<std::string>& names);

/// Sexagesimal "hh:mm:ss.s", "hh mm ss.s", "12h30m00.5s", "-38d36m00s" or
/// decimal text. `hours` = RA (the first field is in hours). Returns degrees or
/// false when the text is not a number of that form.
bool parse_angle_text(const std::string& s, bool hours, double& deg);

/// Factor from a column's unit to degrees (angles) or arcsec (errors). Positions
/// without a unit are degrees, errors without one arcsec. InputError for a unit
/// that is not an angle.
double angle_unit_factor(const Column& c, const std::string& file, bool to_arcsec);

/// A column of angles in degrees (numbers scaled by the unit; text parsed by
/// parse_angle_text, blank = NaN). InputError naming row and column otherwise.
std::vector<double> angle_values(const Column& c, const std::string& file, bool hours);

/// A column as numbers (text parsed; blank = NaN). InputError naming row and column.
std::vector<double> numeric_values(const Column& c, const std::string& file);

/// Where positions are looked for, and the option names the messages point to.
struct PositionColumnOptions {
  std::string ra, dec;         ///< column names given by the user ("" = search)
  std::string frame = "auto";  ///< auto (ICRS columns, else Galactic), icrs or galactic
  std::string ra_option, dec_option, frame_option;  ///< e.g. "match.ra_a" (without "--")
};

struct CataloguePositions {
  std::vector<double> ra_deg, dec_deg;  ///< ICRS [deg]; NaN for a row without a position
  std::string ra_col, dec_col;          ///< the columns used
  std::string frame;                    ///< "icrs" or "galactic" (of the columns)
  std::size_t no_position = 0;          ///< rows with a blank or NaN coordinate
};

/// The positions of every row of `t` (read from `path`). Columns: by option, else
/// UCD pos.eq.ra / pos.eq.dec (";meta.main" first), else names such as ra_deg,
/// ra, RAJ2000 / dec_deg, dec, DEJ2000; with frame auto, Galactic columns
/// (pos.galactic.lon/lat, glon/glat, l/b) when no equatorial pair is found.
/// Galactic -> ICRS with ERFA eraG2icrs (IAU SOFA; Hipparcos frame definition).
/// Throws UsageError for a bad frame option, InputError naming the file for
/// missing columns, an unparsable angle, an infinite longitude or a latitude
/// outside [-90, 90].
CataloguePositions read_catalogue_positions(const Table& t, const std::string& path, const PositionColumnOptions& o);

}  // namespace skerry
