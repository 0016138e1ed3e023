// `skerry survey`: one tile's run (a child process), the per-tile result files,
// the merge of all tiles into the survey catalogue, and the logs.
#include <fcntl.h>
#include <signal.h>
#include <sys/prctl.h>
#include <sys/wait.h>
#include <unistd.h>

#include <oneapi/tbb/parallel_for.h>

#include <nlohmann/json.hpp>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cstring>
#include <exception>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <sstream>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "app/run_record.h"
#include "survey/engine.h"

namespace skerry::surveyrun {

namespace fs = std::filesystem;
using nlohmann::json;

std::string utc_now() {
  std::time_t t = std::time(nullptr);
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buf[32];
  std::strftime(buf, sizeof buf, "%Y-%m-%dT%H:%M:%SZ", &tm);
  return buf;
}

std::string json_str(const std::string& s) { return json(s).dump(); }

void set_catalogue_meta(Table& catalogue, const SurveyConfig& cfg, std::size_t n_tiles, const MergeSummary& sum) {
  if (cfg.bands.size() >= 2 && n_tiles > 0) {  // the catalogue then carries spectra columns
    std::string bl;
    for (const auto& b : cfg.bands) bl += (bl.empty() ? "" : ",") + b;
    catalogue.set_meta("bands", bl);
  }
  std::ostringstream radius;
  radius.precision(17);
  radius << cfg.merge.match_radius_arcsec;
  catalogue.set_meta("survey", cfg.name);
  catalogue.set_meta("tool", "skerry survey " + tool_version());
  catalogue.set_meta("tiles", std::to_string(n_tiles));
  catalogue.set_meta("merge_rule",
                     "each position belongs to the tile with the lowest local noise there (its rms map; ties to the "
                     "first tile by name); a copy within the match radius is kept from the owning tile, else from "
                     "the lowest-noise tile that detected it (merge_flags bit 2, rescued)");
  catalogue.set_meta("self_match_radius_arcsec", radius.str());
  catalogue.set_meta("input_rows", std::to_string(sum.input_rows));
  catalogue.set_meta("duplicates_removed", std::to_string(sum.duplicates_removed));
  catalogue.set_meta("rescued", std::to_string(sum.rescued));
  catalogue.set_meta("residual_duplicate_pairs", std::to_string(sum.residual_duplicate_pairs));
  {
    std::string st;
    for (const auto& t : sum.stale_tiles) st += (st.empty() ? "" : ",") + t;
    catalogue.set_meta("stale_tiles", st.empty() ? "none" : st);
    catalogue.set_meta("stale_rows", std::to_string(sum.stale_rows));
  }
  catalogue.set_meta("designation", cfg.merge.designation_prefix + " JHHMMSS.s+DDMMSS, truncated");
  catalogue.set_meta("row_order", "HEALPix NESTED index at order 29, then RA, Dec, tile, row");
  catalogue.set_meta("merge_fingerprint", sum.fingerprint);
}

std::vector<std::int64_t> spectra_row_of_component(const Table& spectra, std::size_t n_components,
                                                   const std::string& spectra_path,
                                                   const std::string& components_file) {
  const Column* id = spectra.find("component_id");
  if (!id || id->type != ColumnType::Int64) throw InputError(spectra_path, "has no integer column 'component_id'");
  std::vector<std::int64_t> at(n_components, -1);
  for (std::size_t i = 0; i < spectra.rows(); ++i) {
    const std::int64_t c = id->i64[i];
    if (c < 1 || c > static_cast<std::int64_t>(n_components) || at[static_cast<std::size_t>(c - 1)] >= 0)
      throw InputError(spectra_path, "row " + std::to_string(i + 1) + ": component_id " + std::to_string(c) +
                                         " is not a distinct row of " + components_file);
    at[static_cast<std::size_t>(c - 1)] = static_cast<std::int64_t>(i);
  }
  for (std::size_t i = 0; i < at.size(); ++i)
    if (at[i] < 0) throw InputError(spectra_path, "has no row for component " + std::to_string(i + 1));
  return at;
}

namespace {

std::string self_exe() {
  std::error_code ec;
  auto p = fs::read_symlink("/proc/self/exe", ec);
  if (ec) throw std::runtime_error("cannot find this executable (/proc/self/exe): " + ec.message());
  return p.string();
}

/// Runs argv[0] with argv, stdout and stderr to `log_path`; returns the exit
/// status (128 + signal when killed). The child gets SIGKILL when the thread that
/// started it dies (a killed controller leaves no orphan writing files).
int run_child(const std::vector<std::string>& args, const std::string& log_path) {
  std::vector<char*> argv;
  for (const auto& a : args) argv.push_back(const_cast<char*>(a.c_str()));
  argv.push_back(nullptr);
  const pid_t parent = ::getpid();
  const pid_t pid = ::fork();
  if (pid < 0) return 127;
  if (pid == 0) {
    // Only async-signal-safe calls between fork and exec.
    ::prctl(PR_SET_PDEATHSIG, SIGKILL);
    if (::getppid() != parent) ::_exit(127);
    int fd = ::open(log_path.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
    if (fd >= 0) {
      ::dup2(fd, 1);
      ::dup2(fd, 2);
      if (fd > 2) ::close(fd);
    }
    int nul = ::open("/dev/null", O_RDONLY);
    if (nul >= 0) {
      ::dup2(nul, 0);
      if (nul > 2) ::close(nul);
    }
    ::execv(argv[0], argv.data());
    ::_exit(127);
  }
  int status = 0;
  while (::waitpid(pid, &status, 0) < 0) {
    if (errno != EINTR) return 127;
  }
  if (WIFEXITED(status)) return WEXITSTATUS(status);
  if (WIFSIGNALED(status)) return 128 + WTERMSIG(status);
  return 127;
}

std::string last_line(const std::string& path) {
  std::ifstream in(path);
  std::string line, last;
  while (std::getline(in, line))
    if (!line.empty()) last = line;
  if (last.size() > 400) last = last.substr(0, 400) + "...";
  return last;
}

std::string tiles_dir(const SurveyConfig& cfg) { return (fs::path(cfg.output_root) / "tiles").string(); }

json report_json(const TileReport& r) {
  json j;
  j["tile"] = r.name;
  j["ok"] = r.ok;
  j["exit_code"] = r.exit_code;
  j["message"] = r.message;
  j["inputs_sha256"] = r.inputs_sha256;
  j["config_sha256"] = r.config_sha256;
  j["tool_version"] = r.tool_version;
  j["components_file"] = r.components_file;
  j["components_sha256"] = r.components_sha256;
  if (!r.spectra_file.empty()) j["spectra_file"] = r.spectra_file;
  j["rows"] = r.rows;
  j["centre_ra_deg"] = r.centre_ra_deg;
  j["centre_dec_deg"] = r.centre_dec_deg;
  j["seconds"] = r.seconds;
  j["run_id"] = r.run_id;
  return j;
}

std::optional<TileReport> parse_report(const std::string& path) {
  std::ifstream in(path);
  if (!in) return std::nullopt;
  try {
    json j = json::parse(in);
    TileReport r;
    r.name = j.at("tile").get<std::string>();
    r.ok = j.at("ok").get<bool>();
    r.exit_code = j.at("exit_code").get<int>();
    r.message = j.at("message").get<std::string>();
    r.inputs_sha256 = j.at("inputs_sha256").get<std::string>();
    r.config_sha256 = j.at("config_sha256").get<std::string>();
    r.tool_version = j.at("tool_version").get<std::string>();
    r.components_file = j.at("components_file").get<std::string>();
    r.components_sha256 = j.at("components_sha256").get<std::string>();
    r.spectra_file = j.value("spectra_file", std::string());
    r.rows = j.at("rows").get<std::int64_t>();
    r.centre_ra_deg = j.at("centre_ra_deg").get<double>();
    r.centre_dec_deg = j.at("centre_dec_deg").get<double>();
    r.seconds = j.at("seconds").get<double>();
    r.run_id = j.at("run_id").get<std::string>();
    return r;
  } catch (const std::exception&) {
    return std::nullopt;
  }
}

std::string hostname() {
  char h[256] = {0};
  ::gethostname(h, sizeof h - 1);
  return h;
}

}  // namespace

std::optional<TileReport> read_tile_report(const SurveyConfig& cfg, const std::string& name) {
  return parse_report((fs::path(tiles_dir(cfg)) / name / "tile.json").string());
}
std::optional<TileReport> read_failure_report(const SurveyConfig& cfg, const std::string& name) {
  return parse_report((fs::path(tiles_dir(cfg)) / (name + ".failed.json")).string());
}

TileReport process_tile(const SurveyConfig& cfg, const TileInput& tile, const std::string& inputs_sha256,
                        const std::string& run_id) {
  const auto t0 = std::chrono::steady_clock::now();
  TileReport r;
  r.name = tile.name;
  r.inputs_sha256 = inputs_sha256;
  r.config_sha256 = cfg.config_sha256;
  r.tool_version = tool_version();
  r.run_id = run_id;
  const fs::path tdir = tiles_dir(cfg);
  const fs::path final_dir = tdir / tile.name;
  const fs::path failed = tdir / (tile.name + ".failed.json");
  static std::atomic<unsigned> counter{0};
  const fs::path tmp = tdir / ("." + tile.name + "." + hostname() + "." + std::to_string(::getpid()) + "." +
                               std::to_string(counter++) + ".partial");
  auto seconds = [&] { return std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count(); };
  auto fail = [&](int code, const std::string& msg) {
    r.ok = false;
    r.exit_code = code;
    r.message = msg;
    r.seconds = seconds();
    std::error_code ec;
    fs::remove_all(tmp, ec);
    try {
      write_text_atomic(failed.string(), report_json(r).dump(2) + "\n");
    } catch (const std::exception&) {
      // The report returned to the caller still says what happened.
    }
    return r;
  };
  try {
    std::error_code ec;
    fs::create_directories(tdir, ec);
    fs::remove_all(tmp, ec);
    if (!fs::create_directory(tmp, ec)) return fail(kExitOutput, tmp.string() + ": cannot create folder");
    std::vector<std::string> args{self_exe(), "extract", tile.image, "--out", tmp.string(), "--threads",
                                  std::to_string(cfg.threads_per_tile)};
    if (!cfg.extract.empty()) {
      args.push_back("--config");
      args.push_back((fs::path(cfg.output_root) / "stage" / "extract.ini").string());
    }
    const std::string log = (tmp / "extract.log").string();
    const int code = run_child(args, log);
    if (code != 0) {
      std::string msg = last_line(log);
      if (msg.empty()) msg = "skerry extract exited with code " + std::to_string(code);
      return fail(code, msg);
    }
    // The component table extract wrote (exactly one).
    std::vector<std::string> comps;
    for (const auto& e : fs::directory_iterator(tmp)) {
      const std::string n = e.path().filename().string();
      if (n.ends_with(".components.csv") && !is_temporary_name(n)) comps.push_back(n);
    }
    if (comps.size() != 1)
      return fail(kExitInternal, tile.image + ": skerry extract wrote " + std::to_string(comps.size()) +
                                     " component tables (*.components.csv), expected one");
    r.components_file = comps[0];
    r.components_sha256 = sha256_file((tmp / comps[0]).string());
    r.rows = static_cast<std::int64_t>(read_table((tmp / comps[0]).string()).rows());
    // The tile's local noise on sky cells, for the merge's ownership rule.
    try {
      write_tile_noise(tmp.string());
    } catch (const InputError& e) {
      return fail(kExitBadInput, tile.image + ": " + e.what());
    }
    if (cfg.bands.size() >= 2) {
      // Multi-band tile: forced measurements of the extract components in every
      // band (`skerry bands --catalogue`, so spectra row component_id = component
      // table row), into tiles/NAME/bands/.
      const std::vector<std::string> files = tile_band_files(cfg, tile);
      for (const auto& f : files)
        if (!fs::is_regular_file(f, ec)) return fail(kExitBadInput, f + ": band file of tile " + tile.name + " is missing");
      std::vector<std::string> ba{self_exe(), "bands"};
      ba.insert(ba.end(), files.begin(), files.end());
      for (const std::string& a : {std::string("--catalogue"), (tmp / comps[0]).string(), std::string("--out"),
                                   (tmp / "bands").string(), std::string("--output.name"), tile.name,
                                   std::string("--output.formats"), std::string("csv"), std::string("--threads"),
                                   std::to_string(cfg.threads_per_tile)})
        ba.push_back(a);
      if (!cfg.bands_stage.empty()) {
        ba.push_back("--config");
        ba.push_back((fs::path(cfg.output_root) / "stage" / "bands.ini").string());
      }
      const std::string blog = (tmp / "bands.log").string();
      const int bcode = run_child(ba, blog);
      if (bcode != 0) {
        std::string msg = last_line(blog);
        if (msg.empty()) msg = "skerry bands exited with code " + std::to_string(bcode);
        return fail(bcode, msg);
      }
      r.spectra_file = "bands/" + tile.name + ".spectra.csv";
      if (!fs::is_regular_file(tmp / r.spectra_file, ec))
        return fail(kExitInternal, tile.image + ": skerry bands wrote no " + r.spectra_file);
      const std::string both = r.components_sha256 + "\n" + sha256_file((tmp / r.spectra_file).string()) + "\n";
      r.components_sha256 = sha256_hex(both.data(), both.size());
    }
    // Tile centre: the sky position of the central pixel of the grid.
    ImageReadOptions ro;
    ro.require_beam = false;
    ro.accept_any_bunit = true;
    const SkyImage img = read_sky_image(tile.image, ro);
    const double cx = 0.5 * static_cast<double>(img.pixels.cols() - 1);
    const double cy = 0.5 * static_cast<double>(img.pixels.rows() - 1);
    if (!img.wcs->pix_to_sky(cx, cy, r.centre_ra_deg, r.centre_dec_deg))
      return fail(kExitBadInput, tile.image + ": the central pixel has no sky position");
    r.ok = true;
    r.seconds = seconds();
    write_text_atomic((tmp / "tile.json").string(), report_json(r).dump(2) + "\n");
    for (const auto& e : fs::recursive_directory_iterator(tmp))
      fsync_path(e.path(), e.is_directory());
    fsync_path(tmp, true);
    // Swap into place: the old result aside, the new one in, the old one away.
    const fs::path old = tdir / ("." + tile.name + ".old." + std::to_string(::getpid()) + "." +
                                 std::to_string(counter++) + ".partial");
    if (fs::exists(final_dir, ec)) {
      if (::rename(final_dir.c_str(), old.c_str()) != 0)
        return fail(kExitOutput, final_dir.string() + ": cannot move aside: " + std::strerror(errno));
    }
    if (::rename(tmp.c_str(), final_dir.c_str()) != 0)
      return fail(kExitOutput, final_dir.string() + ": cannot rename into place: " + std::strerror(errno));
    fs::remove(failed, ec);
    fsync_path(tdir, true);
    fs::remove_all(old, ec);
    return r;
  } catch (const std::exception& e) {
    return fail(kExitInternal, e.what());
  }
}

// ---- Merge -------------------------------------------------------------------

std::string catalogue_path(const SurveyConfig& cfg) { return (fs::path(cfg.output_root) / cfg.catalogue).string(); }

std::string merge_summary_path(const SurveyConfig& cfg) {
  return (fs::path(cfg.output_root) / (fs::path(cfg.catalogue).stem().string() + ".merge.json")).string();
}

std::string merge_fingerprint(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles) {
  std::ostringstream s;
  s.precision(17);
  s << "skerry-survey-merge-v1\n" << tool_version() << "\n" << cfg.merge_settings << "\n";
  for (const auto& t : tiles)
    s << t.name << " " << t.components_sha256 << " " << t.centre_ra_deg << " " << t.centre_dec_deg
      << (t.stale ? " stale" : "") << "\n";
  const std::string text = s.str();
  return sha256_hex(text.data(), text.size());
}

void put_summary_counts(nlohmann::json& j, const MergeSummary& sum) {
  j["rows"] = sum.rows;
  j["duplicates_removed"] = sum.duplicates_removed;
  j["rescued"] = sum.rescued;
  j["stale_rows"] = sum.stale_rows;
  j["stale_tiles"] = sum.stale_tiles;
  j["residual_duplicate_pairs"] = sum.residual_duplicate_pairs;
  j["name_collisions"] = sum.name_collisions;
  j["partitions"] = sum.partitions;
}

std::optional<MergeSummary> read_merge_summary(const SurveyConfig& cfg) {
  std::ifstream in(merge_summary_path(cfg));
  if (!in) return std::nullopt;
  try {
    json j = json::parse(in);
    MergeSummary m;
    m.fingerprint = j.at("fingerprint").get<std::string>();
    m.tiles = j.at("tiles").get<std::size_t>();
    m.input_rows = j.at("input_rows").get<std::size_t>();
    m.rows = j.at("rows").get<std::size_t>();
    m.duplicates_removed = j.at("duplicates_removed").get<std::size_t>();
    m.rescued = j.at("rescued").get<std::size_t>();
    m.stale_rows = j.at("stale_rows").get<std::size_t>();
    m.stale_tiles = j.at("stale_tiles").get<std::vector<std::string>>();
    m.residual_duplicate_pairs = j.at("residual_duplicate_pairs").get<std::size_t>();
    m.name_collisions = j.at("name_collisions").get<std::size_t>();
    m.partitions = j.at("partitions").get<std::size_t>();
    m.seconds = j.at("seconds").get<double>();
    return m;
  } catch (const std::exception&) {
    return std::nullopt;
  }
}

MergeSummary merge_tiles(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles_in) {
  const auto t0 = std::chrono::steady_clock::now();
  std::vector<MergeTile> tiles = tiles_in;
  std::sort(tiles.begin(), tiles.end(), [](const MergeTile& a, const MergeTile& b) { return a.name < b.name; });
  MergeSummary sum;
  sum.fingerprint = merge_fingerprint(cfg, tiles);
  sum.tiles = tiles.size();

  std::vector<Table> tables;
  // Multi-band tiles: each tile's spectra table and, per component row, its row there.
  std::vector<Table> spectra;
  std::vector<std::vector<std::int64_t>> spectra_row;
  std::vector<survey::TileComponent> comps;
  std::vector<survey::SkyPoint> centres;
  // The tiles' tables are read in parallel first (reading and parsing them is most
  // of this merge's time). Errors are kept per tile and raised in the loop below,
  // in tile order, so the message does not depend on the thread count.
  std::vector<Table> read_comps(tiles.size()), read_spectra(tiles.size());
  std::vector<std::exception_ptr> comps_error(tiles.size()), spectra_error(tiles.size());
  oneapi::tbb::parallel_for(std::size_t{0}, tiles.size(), [&](std::size_t t) {
    const auto rep = read_tile_report(cfg, tiles[t].name);
    if (!rep || !rep->ok || rep->components_sha256 != tiles[t].components_sha256) return;  // raised below
    const fs::path dir = fs::path(tiles_dir(cfg)) / tiles[t].name;
    try {
      read_comps[t] = read_table((dir / rep->components_file).string());
    } catch (...) {
      comps_error[t] = std::current_exception();
    }
    if (cfg.bands.size() < 2 || rep->spectra_file.empty()) return;
    try {
      read_spectra[t] = read_table((dir / rep->spectra_file).string());
    } catch (...) {
      spectra_error[t] = std::current_exception();
    }
  });
  for (std::size_t t = 0; t < tiles.size(); ++t) {
    const auto rep = read_tile_report(cfg, tiles[t].name);
    const std::string rep_path = (fs::path(tiles_dir(cfg)) / tiles[t].name / "tile.json").string();
    if (!rep || !rep->ok) throw InputError(rep_path, "missing or unreadable");
    if (rep->components_sha256 != tiles[t].components_sha256)
      throw InputError(rep_path, "names a component table other than the one recorded for the tile");
    const std::string path = (fs::path(tiles_dir(cfg)) / tiles[t].name / rep->components_file).string();
    if (comps_error[t]) std::rethrow_exception(comps_error[t]);
    Table tab = std::move(read_comps[t]);
    const Column* ra = tab.find(cfg.ra_column);
    const Column* dec = tab.find(cfg.dec_column);
    if (!ra || !dec || ra->type != ColumnType::Float64 || dec->type != ColumnType::Float64)
      throw InputError(path, "has no numeric columns '" + cfg.ra_column + "' and '" + cfg.dec_column + "'");
    if (!tables.empty()) {
      const auto& a = tables.front().columns();
      const auto& b = tab.columns();
      bool same = a.size() == b.size();
      for (std::size_t c = 0; same && c < a.size(); ++c) same = a[c].name == b[c].name && a[c].type == b[c].type;
      if (!same) throw InputError(path, "its columns differ from those of the first tile's table");
    }
    for (std::size_t i = 0; i < tab.rows(); ++i) {
      if (!std::isfinite(ra->f64[i]) || !std::isfinite(dec->f64[i]) || std::fabs(dec->f64[i]) > 90.0)
        throw InputError(path, "row " + std::to_string(i + 1) + " has no valid position");
      comps.push_back({ra->f64[i], dec->f64[i], static_cast<std::int32_t>(t), static_cast<std::int64_t>(i)});
    }
    if (cfg.bands.size() >= 2) {
      if (rep->spectra_file.empty()) throw InputError(rep_path, "names no spectra table (the survey has several bands)");
      const std::string sp = (fs::path(tiles_dir(cfg)) / tiles[t].name / rep->spectra_file).string();
      if (spectra_error[t]) std::rethrow_exception(spectra_error[t]);
      Table st = std::move(read_spectra[t]);
      std::vector<std::int64_t> at = spectra_row_of_component(st, tab.rows(), sp, rep->components_file);
      if (!spectra.empty()) {
        const auto& a = spectra.front().columns();
        const auto& b = st.columns();
        bool same = a.size() == b.size();
        for (std::size_t c = 0; same && c < a.size(); ++c) same = a[c].name == b[c].name && a[c].type == b[c].type;
        if (!same) throw InputError(sp, "its columns differ from those of the first tile's spectra table (same bands in every tile?)");
      }
      spectra.push_back(std::move(st));
      spectra_row.push_back(std::move(at));
    }
    centres.push_back({tiles[t].centre_ra_deg, tiles[t].centre_dec_deg});
    tables.push_back(std::move(tab));
  }
  std::vector<survey::TileNoise> noise(tiles.size());
  for (std::size_t t = 0; t < tiles.size(); ++t) {
    noise[t] = read_tile_noise(cfg, tiles[t].name);
    if (tiles[t].stale) sum.stale_tiles.push_back(tiles[t].name);
  }
  survey::MergeResult mr;
  if (!comps.empty()) mr = survey::merge_components(comps, centres, cfg.merge, noise);
  sum.input_rows = comps.size();
  sum.rows = mr.kept.size();
  sum.duplicates_removed = mr.duplicates_removed;
  sum.rescued = mr.rescued_rows;
  sum.residual_duplicate_pairs = mr.residual_duplicate_pairs;
  sum.name_collisions = mr.name_collisions;
  sum.partitions = mr.partitions;

  Table out;
  out.name = "survey_components";
  std::vector<std::string> tile_names;
  std::vector<std::int64_t> tile_rows, merge_flags;
  for (std::size_t i = 0; i < mr.kept.size(); ++i) {
    const auto& k = mr.kept[i];
    const bool stale = tiles[static_cast<std::size_t>(k.tile)].stale;
    tile_names.push_back(tiles[static_cast<std::size_t>(k.tile)].name);
    tile_rows.push_back(k.row + 1);
    merge_flags.push_back((stale ? kMergeStaleTile : 0) | (mr.rescued[i] ? kMergeRescued : 0));
    sum.stale_rows += stale ? 1 : 0;
  }
  out.add_text("designation", "", "meta.id;meta.main",
               "IAU-style designation from the position, truncated (suffix a, b, ... when several share it)", mr.names);
  out.add_text("tile", "", "meta.id;obs.field", kTileColumnDescription, tile_names);
  out.add_i64("merge_flags", "", "meta.code.qual", kMergeFlagsDescription, merge_flags);
  out.add_i64("tile_row", "", "meta.number", "1-based row of the component in its tile's component table", tile_rows);
  if (!tables.empty()) {
    for (std::size_t c = 0; c < tables.front().columns().size(); ++c) {
      const Column& proto = tables.front().columns()[c];
      Column col;
      col.name = proto.name;
      col.unit = proto.unit;
      col.ucd = proto.ucd;
      col.description = proto.description;
      col.type = proto.type;
      if (out.find(col.name)) col.name = "tile_" + col.name;
      for (const auto& k : mr.kept) {
        const Column& src = tables[static_cast<std::size_t>(k.tile)].columns()[c];
        const auto i = static_cast<std::size_t>(k.row);
        switch (col.type) {
          case ColumnType::Float64: col.f64.push_back(src.f64[i]); break;
          case ColumnType::Int64: col.i64.push_back(src.i64[i]); break;
          case ColumnType::Text: col.text.push_back(src.text[i]); break;
        }
      }
      out.add(std::move(col));
    }
  }
  if (!spectra.empty()) {
    // Spectral columns of the kept components, joined on (tile, component row);
    // the spectra table's own id and position columns are the component's.
    for (std::size_t c = 0; c < spectra.front().columns().size(); ++c) {
      const Column& proto = spectra.front().columns()[c];
      if (proto.name == "component_id" || proto.name == "ra_deg" || proto.name == "dec_deg") continue;
      Column col;
      col.name = out.find(proto.name) ? "spec_" + proto.name : proto.name;
      col.unit = proto.unit;
      col.ucd = proto.ucd;
      col.description = proto.description;
      col.type = proto.type;
      for (const auto& k : mr.kept) {
        const auto t = static_cast<std::size_t>(k.tile);
        const Column& src = spectra[t].columns()[c];
        const auto i = static_cast<std::size_t>(spectra_row[t][static_cast<std::size_t>(k.row)]);
        switch (col.type) {
          case ColumnType::Float64: col.f64.push_back(src.f64[i]); break;
          case ColumnType::Int64: col.i64.push_back(src.i64[i]); break;
          case ColumnType::Text: col.text.push_back(src.text[i]); break;
        }
      }
      out.add(std::move(col));
    }
  }
  set_catalogue_meta(out, cfg, tiles.size(), sum);
  write_table(out, catalogue_path(cfg));
  sum.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  json j;
  j["fingerprint"] = sum.fingerprint;
  j["catalogue"] = cfg.catalogue;
  j["catalogue_sha256"] = sha256_file(catalogue_path(cfg));
  j["tiles"] = sum.tiles;
  j["input_rows"] = sum.input_rows;
  put_summary_counts(j, sum);
  j["seconds"] = sum.seconds;
  write_text_atomic(merge_summary_path(cfg), j.dump(2) + "\n");
  return sum;
}

// ---- Logs --------------------------------------------------------------------

SurveyLog::SurveyLog(const std::string& root) {
  plain_ = ::open((fs::path(root) / "survey.log").c_str(), O_WRONLY | O_CREAT | O_APPEND | O_CLOEXEC, 0644);
  json_ = ::open((fs::path(root) / "survey.jsonl").c_str(), O_WRONLY | O_CREAT | O_APPEND | O_CLOEXEC, 0644);
  if (plain_ < 0 || json_ < 0) throw OutputError((fs::path(root) / "survey.log").string(), "cannot open the log");
}

SurveyLog::~SurveyLog() {
  if (plain_ >= 0) ::close(plain_);
  if (json_ >= 0) ::close(json_);
}

void SurveyLog::write(const std::string& text, const std::string& members) {
  const std::string now = utc_now();
  const std::string a = now + " " + text + "\n";
  const std::string b = "{\"time\":" + json_str(now) + "," + members + "}\n";
  // One write(2) per line on an O_APPEND descriptor: a killed run leaves whole lines.
  if (::write(plain_, a.data(), a.size()) < 0 || ::write(json_, b.data(), b.size()) < 0) {
    // A log that cannot be written must not stop the survey; the state record still holds the outcome.
  }
  ::fsync(plain_);
  ::fsync(json_);
}

}  // namespace skerry::surveyrun
