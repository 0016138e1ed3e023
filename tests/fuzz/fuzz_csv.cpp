// Fuzz target: the CSV and ECSV parsers (modules/table). Expected outcomes: a
// table whose columns all have the same length, or a TableParseError.
#include <cstdint>
#include <string_view>

#include "skerry/table_text.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  std::string_view text(reinterpret_cast<const char*>(data), size);
  try {
    skerry::Table t = skerry::parse_csv(text);
    t.check_consistent();
    // What we parse we can write, and what we write parses back to the same shape.
    skerry::Table back = skerry::parse_csv(skerry::format_csv(t));
    if (back.ncols() != t.ncols() || back.rows() != t.rows()) __builtin_trap();
  } catch (const skerry::TableParseError&) {
  }
  try {
    skerry::parse_ecsv(text).check_consistent();
  } catch (const skerry::TableParseError&) {
  }
  return 0;
}
