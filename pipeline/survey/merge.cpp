// `skerry survey`: the on-disk merge. Scatter (per tile), partition merge (per
// HEALPix partition), concatenation (partitions in pixel order). See
// pipeline/survey/engine.h for the layout and the guarantees.
//
// Intermediate format: a small documented binary table (".stab", below), not
// FITS or CSV. The intermediates must carry every cell bit for bit, because the
// catalogue is written from them and must be byte-identical to the in-memory
// merge's: CSV would re-parse numbers and infer column types again per file; FITS
// binary tables pad strings with blanks (trailing blanks are lost), allow ASCII
// only, and cost two 2880-byte blocks of header per file (a survey has several
// scatter files per tile). The .stab layout, all integers little-endian:
//   "SKSTAB01"                          8 bytes, magic and version
//   u64 ncols, u64 nrows, u64 nmeta
//   per column: u8 type (0 double, 1 int64, 2 text), then name, unit, ucd,
//               description as strings (u32 byte count + bytes)
//   per meta entry: key, value (strings)
//   per column, nrows cells: double/int64 as 8 raw bytes; text as a string
//   "SKSTABND"                          8 bytes, end marker
// Files are written whole under a temporary name and renamed into place
// (AtomicOutput: fsync of file and folder); a reader checks every length
// against the file size and the end marker, so a damaged file is an error
// naming it, never garbage.
#include <fcntl.h>
#include <fitsio.h>
#include <signal.h>
#include <unistd.h>

#include <nlohmann/json.hpp>
#include <oneapi/tbb/parallel_for.h>

#include <algorithm>
#include <atomic>
#include <bit>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <map>
#include <mutex>
#include <set>
#include <sstream>
#include <unordered_map>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/table_io.h"
#include "app/run_record.h"
#include "skerry/table_text.h"
#include "survey/engine.h"

namespace skerry::surveyrun {

namespace fs = std::filesystem;
using nlohmann::json;

static_assert(std::endian::native == std::endian::little, "the .stab format is written little-endian");

namespace {

// ---- .stab binary tables ---------------------------------------------------------

constexpr char kMagic[9] = "SKSTAB01";
constexpr char kEnd[9] = "SKSTABND";

void put_u64(std::string& o, std::uint64_t v) { o.append(reinterpret_cast<const char*>(&v), 8); }
void put_u32(std::string& o, std::uint32_t v) { o.append(reinterpret_cast<const char*>(&v), 4); }
void put_str(std::string& o, const std::string& s) {
  put_u32(o, static_cast<std::uint32_t>(s.size()));
  o += s;
}

std::string encode_stab(const Table& t) {
  t.check_consistent();
  std::string o(kMagic, 8);
  const auto& cols = t.columns();
  put_u64(o, cols.size());
  put_u64(o, t.rows());
  put_u64(o, t.meta.size());
  for (const auto& c : cols) {
    o += static_cast<char>(c.type == ColumnType::Float64 ? 0 : c.type == ColumnType::Int64 ? 1 : 2);
    put_str(o, c.name);
    put_str(o, c.unit);
    put_str(o, c.ucd);
    put_str(o, c.description);
  }
  for (const auto& [k, v] : t.meta) {
    put_str(o, k);
    put_str(o, v);
  }
  for (const auto& c : cols) {
    switch (c.type) {
      case ColumnType::Float64: o.append(reinterpret_cast<const char*>(c.f64.data()), 8 * c.f64.size()); break;
      case ColumnType::Int64: o.append(reinterpret_cast<const char*>(c.i64.data()), 8 * c.i64.size()); break;
      case ColumnType::Text:
        for (const auto& s : c.text) put_str(o, s);
        break;
    }
  }
  o.append(kEnd, 8);
  return o;
}

void write_stab(const Table& t, const std::string& path) { write_text_atomic(path, encode_stab(t)); }

Table read_stab(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw InputError(path, "cannot open the merge intermediate file");
  std::string b((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
  std::size_t p = 0;
  auto bad = [&](const std::string& why) -> InputError {
    return InputError(path, "not a complete skerry binary table (" + why + " at byte " + std::to_string(p) + ")");
  };
  auto need = [&](std::size_t n) {
    if (n > b.size() - p) throw bad("truncated");
  };
  auto u64 = [&] {
    need(8);
    std::uint64_t v;
    std::memcpy(&v, b.data() + p, 8);
    p += 8;
    return v;
  };
  auto str = [&] {
    need(4);
    std::uint32_t n;
    std::memcpy(&n, b.data() + p, 4);
    p += 4;
    need(n);
    std::string s = b.substr(p, n);
    p += n;
    return s;
  };
  need(8);
  if (b.compare(0, 8, kMagic, 8) != 0) throw bad("wrong magic");
  p = 8;
  const std::uint64_t ncols = u64(), nrows = u64(), nmeta = u64();
  // Every column costs >= 17 bytes of description, every cell >= 4 bytes.
  if (ncols > b.size() / 17 || (ncols > 0 && nrows > b.size() / 4) || nmeta > b.size() / 8) throw bad("bad counts");
  Table t;
  std::vector<Column> cols(ncols);
  for (auto& c : cols) {
    need(1);
    const auto ty = static_cast<unsigned char>(b[p++]);
    if (ty > 2) throw bad("bad column type");
    c.type = ty == 0 ? ColumnType::Float64 : ty == 1 ? ColumnType::Int64 : ColumnType::Text;
    c.name = str();
    c.unit = str();
    c.ucd = str();
    c.description = str();
  }
  for (std::uint64_t m = 0; m < nmeta; ++m) {
    std::string k = str();
    t.meta.emplace_back(std::move(k), str());
  }
  for (auto& c : cols) {
    switch (c.type) {
      case ColumnType::Float64:
        need(8 * nrows);
        c.f64.resize(nrows);
        if (nrows) std::memcpy(c.f64.data(), b.data() + p, 8 * nrows);  // data() may be null when empty
        p += 8 * nrows;
        break;
      case ColumnType::Int64:
        need(8 * nrows);
        c.i64.resize(nrows);
        if (nrows) std::memcpy(c.i64.data(), b.data() + p, 8 * nrows);
        p += 8 * nrows;
        break;
      case ColumnType::Text:
        c.text.reserve(nrows);
        for (std::uint64_t r = 0; r < nrows; ++r) c.text.push_back(str());
        break;
    }
    t.add(std::move(c));
  }
  need(8);
  if (b.compare(p, 8, kEnd, 8) != 0 || p + 8 != b.size()) throw bad("no end marker");
  return t;
}

bool same_layout(const Table& a, const Table& b) {
  if (a.ncols() != b.ncols()) return false;
  for (std::size_t c = 0; c < a.ncols(); ++c)
    if (a.columns()[c].name != b.columns()[c].name || a.columns()[c].type != b.columns()[c].type) return false;
  return true;
}

Column empty_like(const Column& proto) {
  Column c;
  c.name = proto.name;
  c.unit = proto.unit;
  c.ucd = proto.ucd;
  c.description = proto.description;
  c.type = proto.type;
  return c;
}

void push_cell(Column& dst, const Column& src, std::size_t i) {
  switch (dst.type) {
    case ColumnType::Float64: dst.f64.push_back(src.f64[i]); break;
    case ColumnType::Int64: dst.i64.push_back(src.i64[i]); break;
    case ColumnType::Text: dst.text.push_back(src.text[i]); break;
  }
}

// ---- Folders ------------------------------------------------------------------------

fs::path merge_root(const SurveyConfig& cfg) { return fs::path(cfg.output_root) / "merge"; }
fs::path scatter_dir(const SurveyConfig& cfg, const std::string& tile) { return merge_root(cfg) / "scatter" / tile; }
std::string pixel_file(std::int64_t pixel, const char* ext) { return "p" + std::to_string(pixel) + ext; }

/// Fault injection for the kill -9 tests (DEVELOPERS.md): the process kills
/// itself with SIGKILL right after the named step when SKERRY_SURVEY_KILL_AFTER
/// names it. Not set in production: no effect.
void kill_point(const char* step) {
  const char* k = std::getenv("SKERRY_SURVEY_KILL_AFTER");
  if (k && std::strcmp(k, step) == 0) ::kill(::getpid(), SIGKILL);
}

/// What decides a tile's scatter files: the tile's results and the settings
/// that place rows in partitions and name the columns.
std::string scatter_key(const SurveyConfig& cfg, const MergeTile& t) {
  std::ostringstream s;
  s.precision(17);
  s << "skerry-survey-scatter-v1\n" << tool_version() << "\n" << t.name << "\n" << t.components_sha256 << "\n"
    << cfg.merge.partition_order << " " << cfg.merge.match_radius_arcsec << " " << cfg.merge.margin_match_radii << "\n"
    << cfg.ra_column << " " << cfg.dec_column << "\n";
  for (const auto& b : cfg.bands) s << b << ",";
  const std::string text = s.str();
  return sha256_hex(text.data(), text.size());
}

std::optional<json> read_json(const fs::path& p) {
  std::ifstream in(p);
  if (!in) return std::nullopt;
  try {
    return json::parse(in);
  } catch (const std::exception&) {
    return std::nullopt;
  }
}

/// The tile's rows in the catalogue's column layout after (name, tile):
/// tile_row, the component table's columns, the spectra columns. The same
/// columns, names and checks as merge_tiles. `ra`/`dec` get the positions.
Table tile_rows(const SurveyConfig& cfg, const MergeTile& tile, std::vector<double>& ra, std::vector<double>& dec) {
  const fs::path tdir = fs::path(cfg.output_root) / "tiles" / tile.name;
  const auto rep = read_tile_report(cfg, tile.name);
  const std::string rep_path = (tdir / "tile.json").string();
  if (!rep || !rep->ok) throw InputError(rep_path, "missing or unreadable");
  if (rep->components_sha256 != tile.components_sha256)
    throw InputError(rep_path, "names a component table other than the one recorded for the tile");
  const std::string path = (tdir / rep->components_file).string();
  Table tab = read_table(path);
  const Column* rc = tab.find(cfg.ra_column);
  const Column* dc = tab.find(cfg.dec_column);
  if (!rc || !dc || rc->type != ColumnType::Float64 || dc->type != ColumnType::Float64)
    throw InputError(path, "has no numeric columns '" + cfg.ra_column + "' and '" + cfg.dec_column + "'");
  for (std::size_t i = 0; i < tab.rows(); ++i)
    if (!std::isfinite(rc->f64[i]) || !std::isfinite(dc->f64[i]) || std::fabs(dc->f64[i]) > 90.0)
      throw InputError(path, "row " + std::to_string(i + 1) + " has no valid position");
  ra = rc->f64;
  dec = dc->f64;
  Table out;
  std::set<std::string> names{"designation", "tile", "merge_flags"};
  std::vector<std::int64_t> rows(tab.rows());
  for (std::size_t i = 0; i < rows.size(); ++i) rows[i] = static_cast<std::int64_t>(i + 1);
  out.add_i64("tile_row", "", "meta.number", "1-based row of the component in its tile's component table", rows);
  names.insert("tile_row");
  for (auto& c : tab.columns()) {
    Column col = std::move(c);
    if (names.count(col.name)) col.name = "tile_" + col.name;
    names.insert(col.name);
    out.add(std::move(col));
  }
  if (cfg.bands.size() >= 2) {
    if (rep->spectra_file.empty()) throw InputError(rep_path, "names no spectra table (the survey has several bands)");
    const std::string sp = (tdir / rep->spectra_file).string();
    Table st = read_table(sp);
    const std::vector<std::int64_t> at = spectra_row_of_component(st, rows.size(), sp, rep->components_file);
    for (const auto& proto : st.columns()) {
      if (proto.name == "component_id" || proto.name == "ra_deg" || proto.name == "dec_deg") continue;
      Column col = empty_like(proto);
      if (names.count(col.name)) col.name = "spec_" + col.name;
      names.insert(col.name);
      for (std::size_t i = 0; i < at.size(); ++i) push_cell(col, proto, static_cast<std::size_t>(at[i]));
      out.add(std::move(col));
    }
  }
  return out;
}

Table select_rows(const Table& t, const std::vector<std::size_t>& idx) {
  Table o;
  for (const auto& c : t.columns()) {
    Column n = empty_like(c);
    for (auto i : idx) push_cell(n, c, i);
    o.add(std::move(n));
  }
  return o;
}

Table empty_layout(const Table& t) {
  Table o;
  for (const auto& c : t.columns()) o.add(empty_like(c));
  return o;
}

std::string fp16(const std::string& fp) { return fp.substr(0, 16); }

}  // namespace

// ---- (a) Scatter ----------------------------------------------------------------------

std::int64_t ensure_scatter(const SurveyConfig& cfg, const MergeTile& tile) {
  const fs::path dir = scatter_dir(cfg, tile.name);
  const std::string key = scatter_key(cfg, tile);
  if (auto j = read_json(dir / "index.json"); j && j->value("key", std::string()) == key)
    return j->at("rows").get<std::int64_t>();
  std::vector<double> ra, dec;
  const Table rows = tile_rows(cfg, tile, ra, dec);
  // Rows by partition, each partition's rows in table order (deterministic).
  std::map<std::int64_t, std::vector<std::size_t>> by_part;
  std::map<std::int64_t, std::size_t> home_rows;
  std::unordered_map<std::int64_t, std::vector<std::int64_t>> cell_parts;
  for (std::size_t i = 0; i < ra.size(); ++i) {
    const std::int64_t k = survey::sky_sort_key(ra[i], dec[i]);
    const std::int64_t cell = survey::scatter_cell(k, cfg.merge);
    auto it = cell_parts.find(cell);
    if (it == cell_parts.end()) it = cell_parts.emplace(cell, survey::partitions_of_cell(cell, cfg.merge)).first;
    for (auto px : it->second) by_part[px].push_back(i);
    ++home_rows[survey::home_partition(k, cfg.merge)];
  }
  const fs::path tmp = dir.parent_path() / ("." + tile.name + "." + std::to_string(::getpid()) + ".partial");
  std::error_code ec;
  fs::remove_all(tmp, ec);
  fs::create_directories(tmp, ec);
  if (ec) throw OutputError(tmp.string(), "cannot create folder: " + ec.message());
  write_stab(empty_layout(rows), (tmp / "layout.stab").string());
  json parts = json::array();
  for (const auto& [px, idx] : by_part) {
    write_stab(select_rows(rows, idx), (tmp / pixel_file(px, ".stab")).string());
    const auto h = home_rows.find(px);
    parts.push_back({px, idx.size(), h == home_rows.end() ? 0 : h->second});
  }
  json j;
  j["key"] = key;
  j["tile"] = tile.name;
  j["components_sha256"] = tile.components_sha256;
  j["rows"] = rows.rows();
  j["partitions"] = parts;  // [pixel, rows, home rows]
  write_text_atomic((tmp / "index.json").string(), j.dump(1) + "\n");
  fsync_path(tmp, true);
  // Swap into place (an old folder aside first; a concurrent writer of the same
  // tile writes the same bytes, so whichever rename wins is right).
  const fs::path old = dir.parent_path() / ("." + tile.name + ".old." + std::to_string(::getpid()) + ".partial");
  fs::remove_all(old, ec);
  if (fs::exists(dir, ec) && ::rename(dir.c_str(), old.c_str()) != 0 && errno != ENOENT)
    throw OutputError(dir.string(), std::string("cannot move aside: ") + std::strerror(errno));
  if (::rename(tmp.c_str(), dir.c_str()) != 0)
    throw OutputError(dir.string(), std::string("cannot rename into place: ") + std::strerror(errno));
  fsync_path(dir.parent_path(), true);
  fs::remove_all(old, ec);
  return static_cast<std::int64_t>(rows.rows());
}

// ---- Plan ---------------------------------------------------------------------------------

namespace {
json plan_json(const MergePlan& p, const std::vector<std::vector<std::size_t>>& part_tiles) {
  json j;
  j["fingerprint"] = p.fingerprint;
  j["input_rows"] = p.input_rows;
  j["tiles"] = json::array();
  for (const auto& t : p.tiles)
    j["tiles"].push_back({{"name", t.name}, {"components_sha256", t.components_sha256},
                          {"centre_ra_deg", t.centre_ra_deg}, {"centre_dec_deg", t.centre_dec_deg},
                          {"stale", t.stale}});
  j["partitions"] = json::array();
  for (std::size_t i = 0; i < p.partitions.size(); ++i)
    j["partitions"].push_back({{"pixel", p.partitions[i]}, {"tiles", part_tiles[i]}});
  return j;
}
}  // namespace

MergePlan plan_merge(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles_in) {
  MergePlan p;
  p.tiles = tiles_in;
  std::sort(p.tiles.begin(), p.tiles.end(), [](const MergeTile& a, const MergeTile& b) { return a.name < b.name; });
  p.fingerprint = merge_fingerprint(cfg, p.tiles);
  p.dir = (merge_root(cfg) / "parts" / fp16(p.fingerprint)).string();
  // pixel -> (home rows, tiles holding rows of it)
  std::map<std::int64_t, std::pair<std::size_t, std::vector<std::size_t>>> parts;
  for (std::size_t t = 0; t < p.tiles.size(); ++t) {
    const fs::path idx = scatter_dir(cfg, p.tiles[t].name) / "index.json";
    auto j = read_json(idx);
    if (!j || j->value("key", std::string()) != scatter_key(cfg, p.tiles[t]))
      throw InputError(idx.string(), "missing or not the scatter of the tile's current results");
    p.input_rows += j->at("rows").get<std::int64_t>();
    for (const auto& e : j->at("partitions")) {
      auto& slot = parts[e.at(0).get<std::int64_t>()];
      slot.first += e.at(2).get<std::size_t>();
      slot.second.push_back(t);
    }
  }
  std::vector<std::vector<std::size_t>> part_tiles;
  for (auto& [px, v] : parts) {
    if (v.first == 0) continue;  // margin rows only: contributes nothing
    p.partitions.push_back(px);
    part_tiles.push_back(v.second);
  }
  const std::string text = plan_json(p, part_tiles).dump(1) + "\n";
  const fs::path pf = fs::path(p.dir) / "plan.json";
  std::ifstream in(pf);
  std::ostringstream cur;
  cur << in.rdbuf();
  if (!in || cur.str() != text) write_text_atomic(pf.string(), text);
  return p;
}

MergePlan read_merge_plan(const std::string& dir) {
  const fs::path pf = fs::path(dir) / "plan.json";
  auto j = read_json(pf);
  if (!j) throw InputError(pf.string(), "missing or unreadable merge plan");
  try {
    MergePlan p;
    p.dir = dir;
    p.fingerprint = j->at("fingerprint").get<std::string>();
    p.input_rows = j->at("input_rows").get<std::int64_t>();
    for (const auto& t : j->at("tiles"))
      p.tiles.push_back({t.at("name").get<std::string>(), t.at("components_sha256").get<std::string>(),
                         t.at("centre_ra_deg").get<double>(), t.at("centre_dec_deg").get<double>(),
                         t.at("stale").get<bool>()});
    for (const auto& e : j->at("partitions")) p.partitions.push_back(e.at("pixel").get<std::int64_t>());
    return p;
  } catch (const std::exception& e) {
    throw InputError(pf.string(), std::string("not a merge plan: ") + e.what());
  }
}

bool partition_done(const MergePlan& plan, std::int64_t pixel) {
  auto j = read_json(fs::path(plan.dir) / pixel_file(pixel, ".json"));
  std::error_code ec;
  return j && j->value("fingerprint", std::string()) == plan.fingerprint &&
         fs::is_regular_file(fs::path(plan.dir) / pixel_file(pixel, ".stab"), ec);
}

// ---- (b) Partition merge ------------------------------------------------------------------

namespace {
/// The plan's noise maps (plan tile order), read once per process and plan.
std::vector<survey::TileNoise> plan_noise(const SurveyConfig& cfg, const MergePlan& plan) {
  static std::mutex mu;
  static std::string cached_fp;
  static std::vector<survey::TileNoise> cached;
  std::lock_guard g(mu);
  if (cached_fp != plan.fingerprint || cached.size() != plan.tiles.size()) {
    std::vector<survey::TileNoise> v;
    for (const auto& t : plan.tiles) v.push_back(read_tile_noise(cfg, t.name));
    cached = std::move(v);
    cached_fp = plan.fingerprint;
  }
  return cached;
}
}  // namespace

std::size_t merge_one_partition(const SurveyConfig& cfg, const MergePlan& plan, std::int64_t pixel) {
  if (partition_done(plan, pixel)) return 0;
  const auto t0 = std::chrono::steady_clock::now();
  // The tiles holding rows of this partition, from the plan file.
  const fs::path pf = fs::path(plan.dir) / "plan.json";
  auto pj = read_json(pf);
  if (!pj) throw InputError(pf.string(), "missing or unreadable merge plan");
  std::vector<std::size_t> tiles;
  for (const auto& e : pj->at("partitions"))
    if (e.at("pixel").get<std::int64_t>() == pixel) tiles = e.at("tiles").get<std::vector<std::size_t>>();
  if (tiles.empty()) throw InputError(pf.string(), "has no partition " + std::to_string(pixel));
  std::vector<survey::SkyPoint> centres;
  for (const auto& t : plan.tiles) centres.push_back({t.centre_ra_deg, t.centre_dec_deg});
  // Every tile's noise cells (ownership looks at all tiles with valid data, not
  // only those with rows here), as the in-memory merge reads them.
  const std::vector<survey::TileNoise> noise = plan_noise(cfg, plan);

  survey::PartitionInput in;
  in.pixel = pixel;
  std::vector<Table> parts(plan.tiles.size());
  std::vector<std::unordered_map<std::int64_t, std::size_t>> at(plan.tiles.size());
  const Table* first = nullptr;
  std::string first_path;
  for (auto t : tiles) {
    if (t >= plan.tiles.size()) throw InputError(pf.string(), "names a tile outside its tile list");
    const std::string path = (scatter_dir(cfg, plan.tiles[t].name) / pixel_file(pixel, ".stab")).string();
    try {
      parts[t] = read_stab(path);
    } catch (const InputError&) {
      // A damaged scatter file: drop the tile's scatter index so that the next
      // run scatters the tile again, then report.
      std::error_code ec;
      fs::remove(scatter_dir(cfg, plan.tiles[t].name) / "index.json", ec);
      throw;
    }
    const Table& tab = parts[t];
    if (!first) {
      first = &tab;
      first_path = path;
    } else if (!same_layout(*first, tab)) {
      throw InputError(path, "its columns differ from those of " + first_path + " (the same columns in every tile?)");
    }
    const Column* row = tab.find("tile_row");
    const Column* ra = tab.find(cfg.ra_column);
    const Column* dec = tab.find(cfg.dec_column);
    if (!row || row->type != ColumnType::Int64 || !ra || !dec || ra->type != ColumnType::Float64 ||
        dec->type != ColumnType::Float64)
      throw InputError(path, "has no tile_row, " + cfg.ra_column + " and " + cfg.dec_column + " columns");
    for (std::size_t i = 0; i < tab.rows(); ++i) {
      in.members.push_back({ra->f64[i], dec->f64[i], static_cast<std::int32_t>(t), row->i64[i] - 1});
      at[t].emplace(row->i64[i] - 1, i);
    }
  }
  const std::size_t members = in.members.size();
  const survey::PartitionResult r = survey::merge_partition(in, centres, cfg.merge, noise);
  in.members.clear();
  in.members.shrink_to_fit();

  Table out;
  std::vector<std::string> tile_names;
  std::vector<std::int64_t> merge_flags;
  std::size_t stale_rows = 0;
  for (std::size_t i = 0; i < r.kept.size(); ++i) {
    const MergeTile& mt = plan.tiles[static_cast<std::size_t>(r.kept[i].tile)];
    tile_names.push_back(mt.name);
    merge_flags.push_back((mt.stale ? kMergeStaleTile : 0) | (r.rescued[i] ? kMergeRescued : 0));
    stale_rows += mt.stale ? 1 : 0;
  }
  out.add_text("designation", "", "meta.id;meta.main",
               "IAU-style designation from the position, truncated (suffix a, b, ... when several share it)", r.names);
  out.add_text("tile", "", "meta.id;obs.field", kTileColumnDescription, tile_names);
  out.add_i64("merge_flags", "", "meta.code.qual", kMergeFlagsDescription, merge_flags);
  for (std::size_t c = 0; c < first->ncols(); ++c) {
    Column col = empty_like(first->columns()[c]);
    for (const auto& k : r.kept) {
      const auto t = static_cast<std::size_t>(k.tile);
      push_cell(col, parts[t].columns()[c], at[t].at(k.row));
    }
    out.add(std::move(col));
  }
  json widths = json::array();
  for (const auto& c : out.columns()) {
    std::size_t w = 0;
    for (const auto& s : c.text) w = std::max(w, s.size());
    widths.push_back(w);
  }
  write_stab(out, (fs::path(plan.dir) / pixel_file(pixel, ".stab")).string());
  json j;
  j["fingerprint"] = plan.fingerprint;
  j["pixel"] = pixel;
  j["members"] = members;
  j["rows"] = r.kept.size();
  j["home_rows"] = r.home_rows;
  j["duplicates_removed"] = r.duplicates_removed;
  j["rescued"] = r.rescued_rows;
  j["stale_rows"] = stale_rows;
  j["residual_duplicate_pairs"] = r.residual_duplicate_pairs;
  j["name_collisions"] = r.name_collisions;
  j["text_widths"] = widths;
  j["seconds"] = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  write_text_atomic((fs::path(plan.dir) / pixel_file(pixel, ".json")).string(), j.dump(1) + "\n");
  return members;
}

// ---- (c) Concatenation ------------------------------------------------------------------------

namespace {

std::string fits_error(int status) {
  char text[FLEN_STATUS] = {0};
  fits_get_errstatus(status, text);
  fits_clear_errmsg();
  return std::string(text) + " (CFITSIO status " + std::to_string(status) + ")";
}

std::string ascii_only(const std::string& s) {
  // As the FITS table writer (pipeline/io/table_io.cpp) does: FITS strings are ASCII text.
  std::string o = s;
  for (char& c : o) {
    const auto u = static_cast<unsigned char>(c);
    if (!(u >= 0x20 && u < 0x7f)) c = '?';
  }
  return o;
}

/// Appends `t`'s rows to the open FITS table at rows first_row + 1 ... (CFITSIO
/// extends the table as rows are written past its end).
void fits_append(fitsfile* f, const Table& t, LONGLONG first_row, const std::string& path) {
  int status = 0;
  const auto n = static_cast<LONGLONG>(t.rows());
  if (n == 0) return;
  for (std::size_t j = 0; j < t.ncols(); ++j) {
    const Column& c = t.columns()[j];
    const int col = static_cast<int>(j + 1);
    switch (c.type) {
      case ColumnType::Float64:
        fits_write_col(f, TDOUBLE, col, first_row + 1, 1, n, const_cast<double*>(c.f64.data()), &status);
        break;
      case ColumnType::Int64: {
        std::vector<LONGLONG> v(c.i64.begin(), c.i64.end());
        fits_write_col(f, TLONGLONG, col, first_row + 1, 1, n, v.data(), &status);
        break;
      }
      case ColumnType::Text: {
        std::vector<std::string> s;
        s.reserve(c.text.size());
        for (const auto& x : c.text) s.push_back(ascii_only(x));
        std::vector<char*> p;
        for (auto& x : s) p.push_back(x.data());
        fits_write_col_str(f, col, first_row + 1, 1, n, p.data(), &status);
        break;
      }
    }
    if (status) throw OutputError(path, "cannot write column data: " + fits_error(status));
  }
}

}  // namespace

MergeSummary concatenate_partitions(const SurveyConfig& cfg, const MergePlan& plan) {
  const auto t0 = std::chrono::steady_clock::now();
  MergeSummary sum;
  sum.fingerprint = plan.fingerprint;
  sum.tiles = plan.tiles.size();
  sum.input_rows = static_cast<std::size_t>(plan.input_rows);
  sum.partitions = plan.partitions.size();
  // The catalogue's columns: designation, tile, then the first tile's layout (as merge_tiles).
  Table proto;
  proto.name = "survey_components";
  proto.add_text("designation", "", "meta.id;meta.main",
                 "IAU-style designation from the position, truncated (suffix a, b, ... when several share it)");
  proto.add_text("tile", "", "meta.id;obs.field", kTileColumnDescription);
  proto.add_i64("merge_flags", "", "meta.code.qual", kMergeFlagsDescription);
  if (plan.tiles.empty()) {
    proto.add_i64("tile_row", "", "meta.number", "1-based row of the component in its tile's component table");
  } else {
    const Table layout = read_stab((scatter_dir(cfg, plan.tiles.front().name) / "layout.stab").string());
    for (const auto& c : layout.columns()) proto.add(empty_like(c));
  }
  std::vector<std::size_t> widths(proto.ncols(), 0);
  std::vector<json> pj;
  for (auto px : plan.partitions) {
    const fs::path jp = fs::path(plan.dir) / pixel_file(px, ".json");
    auto j = read_json(jp);
    if (!j || j->value("fingerprint", std::string()) != plan.fingerprint)
      throw InputError(jp.string(), "missing: partition " + std::to_string(px) + " has not been merged");
    const auto w = j->at("text_widths").get<std::vector<std::size_t>>();
    if (w.size() != widths.size())
      throw InputError(jp.string(), "its columns differ from those of the first tile (the same columns in every tile?)");
    for (std::size_t c = 0; c < w.size(); ++c) widths[c] = std::max(widths[c], w[c]);
    sum.rows += j->at("rows").get<std::size_t>();
    sum.duplicates_removed += j->at("duplicates_removed").get<std::size_t>();
    sum.rescued += j->at("rescued").get<std::size_t>();
    sum.stale_rows += j->at("stale_rows").get<std::size_t>();
    sum.residual_duplicate_pairs += j->at("residual_duplicate_pairs").get<std::size_t>();
    sum.name_collisions += j->at("name_collisions").get<std::size_t>();
    pj.push_back(*j);
  }
  for (const auto& t : plan.tiles)
    if (t.stale) sum.stale_tiles.push_back(t.name);
  set_catalogue_meta(proto, cfg, plan.tiles.size(), sum);

  const std::string cat = catalogue_path(cfg);
  auto part_table = [&](std::size_t i) {
    const std::string path = (fs::path(plan.dir) / pixel_file(plan.partitions[i], ".stab")).string();
    Table t = read_stab(path);
    if (!same_layout(proto, t))
      throw InputError(path, "its columns differ from those of the first tile (the same columns in every tile?)");
    return t;
  };
  const TableFormat fmt = table_format_from_name(cat);
  if (fmt == TableFormat::Csv || fmt == TableFormat::VOTable) {
    // Text formats: the whole-table encoder's header, each partition's rows as
    // the same encoder writes them (rows are encoded independently), the footer.
    std::string head, foot;
    const std::string whole = fmt == TableFormat::Csv ? format_csv(proto) : format_votable(proto);
    const std::string open_mark = "<TABLEDATA>\n", close_mark = "    </TABLEDATA>\n";
    if (fmt == TableFormat::Csv) {
      head = whole;
    } else {
      const auto a = whole.find(open_mark), b = whole.find(close_mark);
      if (a == std::string::npos || b == std::string::npos) throw std::logic_error("VOTable writer without TABLEDATA");
      head = whole.substr(0, a + open_mark.size());
      foot = whole.substr(b);
      // The TABLE element states its row count (written for zero rows here).
      const std::string zero = " nrows=\"0\">";
      const auto z = head.find(zero, head.find("<TABLE "));
      if (z == std::string::npos) throw std::logic_error("VOTable writer without nrows");
      head.replace(z, zero.size(), " nrows=\"" + std::to_string(sum.rows) + "\">");
    }
    AtomicOutput out(cat);
    {
      std::ofstream o(out.temp_path(), std::ios::binary | std::ios::trunc);
      o << head;
      for (std::size_t i = 0; i < plan.partitions.size(); ++i) {
        const Table t = part_table(i);
        std::string s = fmt == TableFormat::Csv ? format_csv(t) : format_votable(t);
        if (fmt == TableFormat::Csv) {
          o.write(s.data() + head.size(), static_cast<std::streamsize>(s.size() - head.size()));
        } else {
          const auto a = s.find(open_mark) + open_mark.size(), b = s.rfind(close_mark);
          o.write(s.data() + a, static_cast<std::streamsize>(b - a));
        }
      }
      o << foot;
      o.flush();
      if (!o) throw OutputError(cat, "cannot write (disk full?)");
    }
    out.commit();
  } else if (sum.rows == 0) {
    write_table(proto, cat);
  } else {
    // FITS: the table writer writes the header (text columns as wide as their
    // widest cell, one placeholder row), then every row is written in place and
    // the checksums are made as that writer makes them.
    Table one = proto;
    for (std::size_t c = 0; c < one.ncols(); ++c) {
      Column& col = one.columns()[c];
      switch (col.type) {
        case ColumnType::Float64: col.f64.push_back(0.0); break;
        case ColumnType::Int64: col.i64.push_back(0); break;
        case ColumnType::Text: col.text.push_back(std::string(std::max<std::size_t>(1, widths[c]), 'x')); break;
      }
    }
    const fs::path tmpdir = fs::path(cfg.output_root) / ("." + fs::path(cat).stem().string() + "." +
                                                         std::to_string(::getpid()) + ".concat.partial");
    std::error_code ec;
    fs::remove_all(tmpdir, ec);
    const std::string tmp = (tmpdir / fs::path(cat).filename()).string();
    write_table(one, tmp);
    int status = 0;
    fitsfile* f = nullptr;
    fits_open_file(&f, tmp.c_str(), READWRITE, &status);
    int hdutype = 0;
    fits_movabs_hdu(f, 2, &hdutype, &status);
    if (status) throw OutputError(cat, "cannot reopen the FITS table: " + fits_error(status));
    try {
      LONGLONG row = 0;
      for (std::size_t i = 0; i < plan.partitions.size(); ++i) {
        const Table t = part_table(i);
        fits_append(f, t, row, cat);
        row += static_cast<LONGLONG>(t.rows());
      }
      // Checksums exactly as the FITS table writer makes them (fixed comments, no time stamps).
      fits_write_chksum(f, &status);
      fits_modify_comment(f, "DATASUM", "data unit checksum", &status);
      fits_modify_key_str(f, "CHECKSUM", "0000000000000000", "HDU checksum", &status);
      unsigned long datasum = 0, hdusum = 0;
      char ascii[17] = {0};
      fits_get_chksum(f, &datasum, &hdusum, &status);
      fits_encode_chksum(hdusum, 1, ascii);
      fits_modify_key_str(f, "CHECKSUM", ascii, "HDU checksum", &status);
      if (status) throw OutputError(cat, "cannot write checksums: " + fits_error(status));
    } catch (...) {
      int s2 = 0;
      fits_close_file(f, &s2);
      fs::remove_all(tmpdir, ec);
      throw;
    }
    fits_close_file(f, &status);
    if (status) throw OutputError(cat, "cannot close the FITS table: " + fits_error(status));
    fsync_path(tmp, false);
    if (::rename(tmp.c_str(), cat.c_str()) != 0)
      throw OutputError(cat, std::string("cannot rename into place: ") + std::strerror(errno));
    fsync_path(fs::path(cat).parent_path(), true);
    fs::remove_all(tmpdir, ec);
  }
  sum.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  json j;
  j["fingerprint"] = sum.fingerprint;
  j["catalogue"] = cfg.catalogue;
  j["catalogue_sha256"] = sha256_file(cat);
  j["tiles"] = sum.tiles;
  j["input_rows"] = sum.input_rows;
  put_summary_counts(j, sum);
  j["seconds"] = sum.seconds;
  j["merge"] = "on disk";
  write_text_atomic(merge_summary_path(cfg), j.dump(2) + "\n");
  return sum;
}

// ---- Local driver ---------------------------------------------------------------------------------

std::optional<MergeSummary> merge_tiles_on_disk(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles,
                                                std::vector<std::string>& failed) {
  const auto t0 = std::chrono::steady_clock::now();
  // (a) tiles in parallel, one tile in memory per worker; grain 1 (tiles are big).
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, tiles.size(), 1),
                            [&](const oneapi::tbb::blocked_range<std::size_t>& r) {
                              for (auto i = r.begin(); i != r.end(); ++i) ensure_scatter(cfg, tiles[i]);
                            });
  kill_point("scatter");
  const MergePlan plan = plan_merge(cfg, tiles);
  // (b) partitions in parallel; each is independent and writes its own files.
  std::mutex mu;
  std::atomic<bool> one_done{false};
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, plan.partitions.size(), 1),
                            [&](const oneapi::tbb::blocked_range<std::size_t>& r) {
                              for (auto i = r.begin(); i != r.end(); ++i) {
                                try {
                                  merge_one_partition(cfg, plan, plan.partitions[i]);
                                  if (!one_done.exchange(true)) kill_point("partition");
                                } catch (const std::exception& e) {
                                  std::lock_guard g(mu);
                                  failed.push_back("merge partition " + std::to_string(plan.partitions[i]) +
                                                   " failed: " + e.what());
                                }
                              }
                            });
  std::sort(failed.begin(), failed.end());
  if (!failed.empty()) return std::nullopt;
  kill_point("partitions");
  // (c)
  MergeSummary s = concatenate_partitions(cfg, plan);
  s.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  kill_point("concat");
  return s;
}

void prune_merge_folders(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles, const std::string& keep_fp) {
  std::error_code ec;
  const fs::path parts = merge_root(cfg) / "parts";
  if (fs::is_directory(parts, ec))
    for (const auto& e : fs::directory_iterator(parts, ec))
      if (e.path().filename().string() != fp16(keep_fp)) fs::remove_all(e.path(), ec);
  std::set<std::string> names;
  for (const auto& t : tiles) names.insert(t.name);
  const fs::path sc = merge_root(cfg) / "scatter";
  if (fs::is_directory(sc, ec))
    for (const auto& e : fs::directory_iterator(sc, ec))
      if (!names.count(e.path().filename().string())) fs::remove_all(e.path(), ec);
}

}  // namespace skerry::surveyrun
