// Fuzz target: the VOTable parser (modules/table). Expected outcomes: a table
// whose columns all have the same length, or a TableParseError.
#include <cstdint>
#include <string_view>

#include "skerry/table_text.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  std::string_view text(reinterpret_cast<const char*>(data), size);
  try {
    skerry::Table t = skerry::parse_votable(text);
    t.check_consistent();
    skerry::Table back = skerry::parse_votable(skerry::format_votable(t));
    if (back.ncols() != t.ncols() || back.rows() != t.rows()) __builtin_trap();
  } catch (const skerry::TableParseError&) {
  }
  return 0;
}
