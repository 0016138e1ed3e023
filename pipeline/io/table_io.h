#pragma once
/// Catalogue tables in and out: CSV, FITS binary table (CFITSIO) and IVOA
/// VOTable 1.4, chosen by file-name ending (.csv, .fits/.fit, .vot/.xml);
/// ECSV (.ecsv) is read too.
#include <string>

#include "skerry/table.h"

namespace skerry {

enum class TableFormat { Csv, Fits, VOTable, Ecsv };

/// By file-name ending; throws UsageError for an unknown ending.
TableFormat table_format_from_name(const std::string& path);

/// Read a table. "FILE[SEL]" reads one TABLE of a VOTable with several (SEL: a
/// 0-based index in document order, as astropy counts, or the TABLE's name or
/// ID). Throws InputError naming the file, and the row/column where a cell is
/// bad; UsageError for an unknown ending or a selection on another format.
Table read_table(const std::string& path);

/// The file of a table argument: "FILE[SEL]" -> "FILE" (as read_table reads it),
/// anything else unchanged. For checksums and sizes of the file read.
std::string table_file_path(const std::string& path_with_selection);

/// Write atomically. Throws OutputError.
void write_table(const Table& table, const std::string& path);

}  // namespace skerry
