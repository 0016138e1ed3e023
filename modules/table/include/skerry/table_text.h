#pragma once
/// Text encodings of a Table: CSV (one header row) and IVOA VOTable 1.4
/// (TABLEDATA serialisation). Pure functions: no files, no global state.
///
/// Numbers are written in the shortest form that reads back to the same double
/// (std::to_chars), so outputs are byte-identical across runs and machines.
/// NaN in a Float64 column is written as an empty cell (CSV) or an empty <TD/>
/// (VOTable), and an empty cell reads back as NaN. Int64 columns have no null.
///
/// Parsers never crash on any byte string: bad input throws TableParseError
/// (a std::invalid_argument) with a one-line reason and, where the problem is
/// in one cell, its 1-based data row and column name (row/column members).
#include <cstddef>
#include <stdexcept>
#include <string>
#include <string_view>
#include <vector>

#include "skerry/table.h"

namespace skerry {

/// One-line parse error. `row` is the 1-based data row (0 = not about a row:
/// header or structure), `column` the column name (empty = not about a column).
struct TableParseError : std::invalid_argument {
  TableParseError(const std::string& what, std::size_t row_ = 0, std::string column_ = {})
      : std::invalid_argument(what), row(row_), column(std::move(column_)) {}
  std::size_t row = 0;
  std::string column;
};

/// Shortest round-trip text of a double ("nan"-free: NaN -> "", +-inf -> "inf"/"-inf").
std::string format_double(double v);

// ---- CSV (RFC 4180 quoting) -------------------------------------------------

/// One header row of column names, then one line per row, '\n' line ends.
/// A field is quoted ("...", inner quotes doubled) when it holds a comma, a
/// quote, a line break, or leading/trailing blanks. Units, UCDs and meta are
/// not written (CSV stays plain; document the columns elsewhere).
std::string format_csv(const Table& t);

struct CsvReadOptions {
  char delimiter = ',';
  /// Columns that must be numeric: a non-numeric (non-empty) cell there is a
  /// TableParseError naming row and column. Others are inferred.
  std::vector<std::string> numeric_columns;
  /// Columns kept as Text even when every cell reads as a number (cells as written).
  std::vector<std::string> text_columns;
  /// Lines starting with this character before the header are skipped (0 = none).
  char comment = '#';
};

/// Parse CSV text with a header row. Accepts '\n' or "\r\n" line ends, quoted
/// fields (with embedded delimiters, quotes and line breaks), a UTF-8 BOM and a
/// missing final newline. Type inference per column: Int64 when every
/// non-empty cell is an integer and no cell is empty; Float64 when every
/// non-empty cell is a number (empty cells -> NaN; "nan", "inf" accepted);
/// Text otherwise. Throws TableParseError on ragged rows, unterminated quotes,
/// empty or duplicate column names.
Table parse_csv(std::string_view text, const CsvReadOptions& opt = {});

// ---- VOTable 1.4 (TABLEDATA) --------------------------------------------------

/// VOTABLE version="1.4" / RESOURCE / TABLE name=t.name; table meta as
/// <INFO name=key value=value/> in the RESOURCE; one FIELD per column with
/// name, datatype (double / long / char arraysize="*"), unit, ucd and a
/// DESCRIPTION; DATA/TABLEDATA rows. Text is XML-escaped; characters not
/// allowed in XML 1.0 are replaced by U+FFFD.
std::string format_votable(const Table& t);

struct VotableReadOptions {
  /// Which TABLE: "" = the first; all digits = 0-based index in document order
  /// (as astropy.io.votable counts); otherwise the TABLE's name or ID attribute.
  std::string table;
};

/// Parse a VOTable with TABLEDATA, BINARY or BINARY2 serialisation (inline
/// base64 STREAMs), one TABLE chosen by `opt`.
/// FIELD datatypes: double/float -> Float64; long/int/short/unsignedByte ->
/// Int64 (null cells of integer columns -> the column becomes Float64 with NaN);
/// boolean/char/unicodeChar -> Text; arrays other than strings -> error.
/// INFO and PARAM elements of the RESOURCE/TABLE become meta (key=name).
/// FITS serialisation, external STREAMs and a TABLE that is not there ->
/// TableParseError saying so (the latter listing the TABLEs there are).
Table parse_votable(std::string_view text, const VotableReadOptions& opt = {});

// ---- ECSV 1.0 -----------------------------------------------------------------

/// Parse an ECSV file (Enhanced Character Separated Values, version 1.0:
/// "# %ECSV" line, a YAML header in '# ' comment lines giving every column's
/// name, datatype, unit and description, the delimiter (space or comma) and
/// table meta, then a header row and the data rows). Datatypes float16/32/64 ->
/// Float64; int8..uint64 -> Int64 (empty cells -> Float64 with NaN); string and
/// bool -> Text. Simple `key: value` pairs of the header's meta become meta.
/// Throws TableParseError when the header is not ECSV, the header row does not
/// match the declared columns, or a cell is not of its declared type.
Table parse_ecsv(std::string_view text);

}  // namespace skerry
