#include "skerry/table.h"

namespace skerry {

Column& Table::add(Column c) {
  if (find(c.name)) throw std::logic_error("table '" + name + "': duplicate column '" + c.name + "'");
  columns_.push_back(std::move(c));
  return columns_.back();
}

Column& Table::add_f64(std::string n, std::string unit, std::string ucd, std::string desc,
                       std::vector<double> v) {
  Column c{std::move(n), std::move(unit), std::move(ucd), std::move(desc), ColumnType::Float64, std::move(v), {}, {}};
  return add(std::move(c));
}

Column& Table::add_i64(std::string n, std::string unit, std::string ucd, std::string desc,
                       std::vector<std::int64_t> v) {
  Column c{std::move(n), std::move(unit), std::move(ucd), std::move(desc), ColumnType::Int64, {}, std::move(v), {}};
  return add(std::move(c));
}

Column& Table::add_text(std::string n, std::string unit, std::string ucd, std::string desc,
                        std::vector<std::string> v) {
  Column c{std::move(n), std::move(unit), std::move(ucd), std::move(desc), ColumnType::Text, {}, {}, std::move(v)};
  return add(std::move(c));
}

const Column* Table::find(const std::string& n) const {
  for (const auto& c : columns_)
    if (c.name == n) return &c;
  return nullptr;
}

Column* Table::find(const std::string& n) {
  for (auto& c : columns_)
    if (c.name == n) return &c;
  return nullptr;
}

const Column& Table::at(const std::string& n) const {
  if (const Column* c = find(n)) return *c;
  throw std::out_of_range("table '" + name + "' has no column '" + n + "'");
}

void Table::set_meta(const std::string& key, const std::string& value) {
  for (auto& kv : meta)
    if (kv.first == key) {
      kv.second = value;
      return;
    }
  meta.emplace_back(key, value);
}

const std::string* Table::get_meta(const std::string& key) const {
  for (const auto& kv : meta)
    if (kv.first == key) return &kv.second;
  return nullptr;
}

void Table::check_consistent() const {
  for (const auto& c : columns_)
    if (c.size() != rows())
      throw std::logic_error("table '" + name + "': column '" + c.name + "' has " +
                             std::to_string(c.size()) + " rows, expected " + std::to_string(rows()));
}

}  // namespace skerry
