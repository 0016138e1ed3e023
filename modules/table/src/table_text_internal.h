#pragma once
// Helpers shared by the CSV and VOTable codecs (not part of the public API).
#include <cstdint>
#include <string>
#include <string_view>

namespace skerry::table_detail {

std::string format_int(std::int64_t v);
std::string_view trim(std::string_view s);
/// Whole (trimmed) string is an integer in int64 range.
bool parse_int(std::string_view s, std::int64_t& out);
/// Whole (trimmed) string is a number ("nan", "inf", "+1e3" accepted).
bool parse_double(std::string_view s, double& out);
/// Printable excerpt of untrusted text for an error message.
std::string shorten(std::string_view s);
/// "row R, column 'C'" (parts omitted when 0/empty).
std::string where(std::size_t row, const std::string& column);

}  // namespace skerry::table_detail
