#pragma once
/// Column-oriented in-memory catalogue table shared by every stage, with the
/// metadata that FITS binary tables and VOTables carry: unit, IVOA UCD and a
/// description per column, and key/value metadata for the whole table.
///
/// Encoding to and decoding from CSV and VOTable text lives in table_text.h;
/// FITS binary tables are read and written by pipeline/io (CFITSIO).
#include <cstdint>
#include <stdexcept>
#include <string>
#include <utility>
#include <variant>
#include <vector>

namespace skerry {

enum class ColumnType { Float64, Int64, Text };

struct Column {
  std::string name;
  std::string unit;         ///< FITS/IAU unit string ("deg", "arcsec", "Jy", "Jy/beam", "")
  std::string ucd;          ///< IVOA UCD1+ ("pos.eq.ra;meta.main")
  std::string description;  ///< one sentence for humans
  ColumnType type = ColumnType::Float64;
  std::vector<double> f64;       ///< used when type == Float64 (NaN = null)
  std::vector<std::int64_t> i64; ///< used when type == Int64
  std::vector<std::string> text; ///< used when type == Text

  std::size_t size() const {
    switch (type) {
      case ColumnType::Float64: return f64.size();
      case ColumnType::Int64: return i64.size();
      case ColumnType::Text: return text.size();
    }
    return 0;
  }
};

class Table {
 public:
  std::string name;  ///< what the table holds ("components", "islands", ...)
  std::vector<std::pair<std::string, std::string>> meta;  ///< key/value provenance

  std::size_t rows() const { return columns_.empty() ? 0 : columns_.front().size(); }
  std::size_t ncols() const { return columns_.size(); }
  const std::vector<Column>& columns() const { return columns_; }
  std::vector<Column>& columns() { return columns_; }

  Column& add(Column c);
  Column& add_f64(std::string name, std::string unit, std::string ucd, std::string desc,
                  std::vector<double> values = {});
  Column& add_i64(std::string name, std::string unit, std::string ucd, std::string desc,
                  std::vector<std::int64_t> values = {});
  Column& add_text(std::string name, std::string unit, std::string ucd, std::string desc,
                   std::vector<std::string> values = {});

  /// Column by name, or nullptr.
  const Column* find(const std::string& name) const;
  Column* find(const std::string& name);
  /// Column by name; throws std::out_of_range naming the column when absent.
  const Column& at(const std::string& name) const;

  void set_meta(const std::string& key, const std::string& value);
  const std::string* get_meta(const std::string& key) const;

  /// Throws std::logic_error when columns differ in length (a bug, not bad input).
  void check_consistent() const;

 private:
  std::vector<Column> columns_;
};

}  // namespace skerry
