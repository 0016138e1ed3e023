// `skerry survey`: the survey description (INI, same format as the stage
// configurations) and tile discovery.
#include <glob.h>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <set>
#include <sstream>

#include "app/errors.h"
#include "app/options.h"
#include "app/run_record.h"
#include "survey/engine.h"
#include "app/version.h"

namespace skerry::surveyrun {

namespace fs = std::filesystem;

std::string tool_version() { return std::string(SKERRY_VERSION) + " (" + SKERRY_GIT_REVISION + ")"; }

namespace {

std::vector<std::string> split_list(const std::string& s) {
  std::vector<std::string> out;
  std::string cur;
  for (char ch : s) {
    if (ch == ',' || ch == ' ' || ch == '\t') {
      if (!cur.empty()) out.push_back(cur);
      cur.clear();
    } else {
      cur += ch;
    }
  }
  if (!cur.empty()) out.push_back(cur);
  return out;
}

std::string absolute_from(const std::string& base, const std::string& p) {
  fs::path q(p);
  if (q.is_relative()) q = fs::path(base) / q;
  return q.lexically_normal().string();
}

/// The survey's own checks of settings that other commands would only find
/// later (all in one place).
void check_survey_settings(const SurveyConfig& cfg, const std::string& path) {
  if (auto m = cfg.extract.find("output.maps"); m != cfg.extract.end()) {
    std::string v = m->second;
    std::transform(v.begin(), v.end(), v.begin(), [](unsigned char c) { return std::tolower(c); });
    if (v == "false" || v == "0" || v == "no" || v == "off")
      throw UsageError(path + ": output.maps = " + m->second +
                       " breaks being true (the survey merge reads each tile's rms map to give every position to "
                       "the tile with the lowest noise there)");
  }
  for (const auto& r : cfg.retired_tiles)
    if (r.find_first_of("/*?[") != std::string::npos)
      throw UsageError(path + ": survey.retired_tiles = " + r + " breaks being a tile name (no '/' or wildcards)");
}

}  // namespace

namespace {

/// Where the survey file's values go while it is read.
struct FileValues {
  std::string tiles, output, catalogue, engine, prefix, bands, detection_band, retired;
  int workers = 2, tpt = 1, order = 4;
  double radius = 5.0, margin = 3.0;
};

/// Every key the survey file itself defines (the stage sections belong to
/// extract and bands), bound to `cfg` and `t`.
po::options_description survey_file_description(SurveyConfig& cfg, FileValues& t) {
  po::options_description d("survey file keys");
  // clang-format off
  d.add_options()
    ("survey.name", po::value<std::string>(&cfg.name)->default_value("survey"), "survey name (logs, catalogue meta)")
    ("survey.tiles", po::value<std::string>(&t.tiles), "tile images: globs or files, comma-separated, relative to this file")
    ("survey.output", po::value<std::string>(&t.output), "output root folder, relative to this file")
    ("survey.retired_tiles", po::value<std::string>(&t.retired)->default_value(""), "tiles (by name, comma-separated) dropped from the survey: not processed even when matched, their rows no longer merged (a tile that is missing, unreadable or failed otherwise keeps its last good rows, marked stale)")
    ("survey.catalogue", po::value<std::string>(&t.catalogue)->default_value("survey.components.csv"), "merged catalogue file name in the output root (.csv, .fits or .vot)")
    ("survey.bands", po::value<std::string>(&t.bands)->default_value(""), "multi-band tiles: file-stem suffix of each band, comma-separated (e.g. _0900MHz,_1400MHz,_3000MHz); empty = one band")
    ("survey.detection_band", po::value<std::string>(&t.detection_band)->default_value(""), "suffix of the band whose extract catalogue gives a tile's components (default: the first of survey.bands)")
    ("survey.engine", po::value<std::string>(&t.engine)->default_value("local"), "local or slurm")
    ("survey.workers", po::value<int>(&t.workers)->default_value(2), "tiles processed at once by the local engine")
    ("survey.threads_per_tile", po::value<int>(&t.tpt)->default_value(1), "--threads of each tile run")
    ("survey.match_radius_arcsec", po::value<double>(&t.radius)->default_value(5.0), "self-match radius of the duplicate check [arcsec]")
    ("survey.margin_match_radii", po::value<double>(&t.margin)->default_value(3.0), "overlap margin of a sky partition [match radii]")
    ("survey.partition_order", po::value<int>(&t.order)->default_value(4), "HEALPix order of the merge partitions (results do not depend on it)")
    ("survey.merge_in_memory_rows", po::value<std::int64_t>(&cfg.merge_in_memory_rows)->default_value(1000000), "local engine: merge surveys of at most this many tile rows in memory (same bytes as on disk; 0 = always on disk)")
    ("catalogue.designation_prefix", po::value<std::string>(&t.prefix)->default_value("SKDC"), "prefix of the source designations (PREFIX JHHMMSS.s+DDMMSS): the merged catalogue's and every tile's (passed to extract)")
    ("survey.ra_column", po::value<std::string>(&cfg.ra_column)->default_value("ra_deg"), "RA column of the tile component tables [deg]")
    ("survey.dec_column", po::value<std::string>(&cfg.dec_column)->default_value("dec_deg"), "Dec column of the tile component tables [deg]")
    ("slurm.partition", po::value<std::string>(&cfg.slurm.partition)->default_value(""), "sbatch --partition (empty: the default)")
    ("slurm.account", po::value<std::string>(&cfg.slurm.account)->default_value(""), "sbatch --account (empty: none)")
    ("slurm.cpus_per_task", po::value<int>(&cfg.slurm.cpus_per_task)->default_value(1), "sbatch --cpus-per-task of a tile task")
    ("slurm.mem", po::value<std::string>(&cfg.slurm.mem)->default_value("2G"), "sbatch --mem of a tile task")
    ("slurm.time", po::value<std::string>(&cfg.slurm.time)->default_value("01:00:00"), "sbatch --time of a tile task")
    ("slurm.max_parallel", po::value<int>(&cfg.slurm.max_parallel)->default_value(0), "array throttle: tasks running at once (0 = no limit)")
    ("slurm.merge_mem", po::value<std::string>(&cfg.slurm.merge_mem)->default_value("4G"), "sbatch --mem of the merge job")
    ("slurm.merge_time", po::value<std::string>(&cfg.slurm.merge_time)->default_value("01:00:00"), "sbatch --time of the merge job")
    ("slurm.poll_seconds", po::value<double>(&cfg.slurm.poll_seconds)->default_value(1.0), "squeue polling interval [s]")
    ("slurm.extra", po::value<std::string>(&cfg.slurm.extra)->default_value(""), "extra sbatch arguments, space-separated");
  // clang-format on
  return d;
}

}  // namespace

void print_survey_file_keys(std::ostream& os) {
  SurveyConfig cfg;
  FileValues t;
  const po::options_description d = survey_file_description(cfg, t);
  os << "Survey file keys (SECTION.KEY; in CONFIG, KEY goes under [SECTION]; every other section is\n"
        "a stage setting of extract, or of bands for [bands], [forced] and [maps]):\n";
  for (const auto& o : d.options()) {
    std::string line = "  " + o->long_name();
    line += std::string(line.size() < 34 ? 34 - line.size() : 2, ' ');
    os << line << o->description() << "\n";
  }
}

SurveyConfig load_survey_config(const std::string& path) {
  SurveyConfig cfg;
  std::error_code ec;
  fs::path abs = fs::absolute(path, ec);
  if (ec || !fs::is_regular_file(abs, ec)) throw InputError(path, "cannot open survey configuration file");
  cfg.config_path = abs.lexically_normal().string();
  cfg.base_dir = abs.parent_path().lexically_normal().string();

  FileValues t;
  po::options_description d = survey_file_description(cfg, t);
  std::string& tiles = t.tiles;
  std::string& output = t.output;
  std::string& catalogue = t.catalogue;
  std::string& engine = t.engine;
  std::string& prefix = t.prefix;
  std::string& bands = t.bands;
  std::string& detection_band = t.detection_band;
  int& workers = t.workers;
  int& tpt = t.tpt;
  int& order = t.order;
  double& radius = t.radius;
  double& margin = t.margin;
  std::string& retired = t.retired;
  std::ifstream in(cfg.config_path);
  if (!in) throw InputError(path, "cannot open survey configuration file");
  po::variables_map vm;
  try {
    auto parsed = po::parse_config_file(in, d, /*allow_unregistered=*/true);
    for (const auto& o : parsed.options) {
      if (!o.unregistered) continue;
      const std::string& key = o.string_key;
      const auto dot = key.find('.');
      const std::string section = dot == std::string::npos ? "" : key.substr(0, dot);
      if (section.empty() || section == "survey" || section == "slurm" || dot + 1 >= key.size())
        throw UsageError(path + ": unknown option '" + key + "'");
      // Every other section ([image], [noise], [detect], [fit], [output], ...) is a
      // stage setting of `skerry extract`, passed through; extract checks it.
      // [bands], [forced] and [maps] are stage settings of `skerry bands`.
      auto& dest = (section == "bands" || section == "forced" || section == "maps") ? cfg.bands_stage : cfg.extract;
      if (dest.count(key)) throw UsageError(path + ": option '" + key + "' given twice");
      dest[key] = o.value.empty() ? "" : o.value.front();
    }
    po::store(parsed, vm);
    po::notify(vm);
  } catch (const po::error& e) {
    throw UsageError(path + ": " + e.what());
  }
  auto need = [&](bool ok, const std::string& opt, const std::string& v, const std::string& rule) {
    if (!ok) throw UsageError(path + ": " + opt + " = " + v + " breaks " + rule);
  };
  need(!tiles.empty(), "survey.tiles", "''", "a glob or a list of tile images");
  need(!output.empty(), "survey.output", "''", "an output folder");
  need(engine == "local" || engine == "slurm", "survey.engine", engine, "local or slurm");
  need(workers >= 1 && workers <= 1024, "survey.workers", std::to_string(workers), "1 <= workers <= 1024");
  need(tpt >= 0 && tpt <= 1024, "survey.threads_per_tile", std::to_string(tpt), "0 <= threads_per_tile <= 1024");
  need(!catalogue.empty() && catalogue.find('/') == std::string::npos && catalogue[0] != '.',
       "survey.catalogue", catalogue, "a plain file name");
  {
    const std::string ext = fs::path(catalogue).extension().string();
    need(ext == ".csv" || ext == ".fits" || ext == ".fit" || ext == ".vot" || ext == ".xml", "survey.catalogue",
         catalogue, "a name ending in .csv, .fits or .vot");
  }
  need(cfg.merge_in_memory_rows >= 0, "survey.merge_in_memory_rows", std::to_string(cfg.merge_in_memory_rows), ">= 0");
  need(cfg.slurm.cpus_per_task >= 1, "slurm.cpus_per_task", std::to_string(cfg.slurm.cpus_per_task), ">= 1");
  need(cfg.slurm.max_parallel >= 0, "slurm.max_parallel", std::to_string(cfg.slurm.max_parallel), ">= 0");
  need(cfg.slurm.poll_seconds > 0.0 && cfg.slurm.poll_seconds <= 600.0, "slurm.poll_seconds",
       std::to_string(cfg.slurm.poll_seconds), "0 < poll_seconds <= 600");
  if (auto f = cfg.extract.find("output.formats"); f != cfg.extract.end()) {
    const auto fm = split_list(f->second);
    need(std::find(fm.begin(), fm.end(), "csv") != fm.end(), "output.formats", f->second,
         "a list holding csv (the survey merges the tiles' NAME.components.csv)");
  }
  need(!cfg.extract.count("output.name"), "output.name", cfg.extract.count("output.name") ? cfg.extract["output.name"] : "",
       "being unset (a tile's outputs are named after its image)");
  cfg.bands = split_list(bands);
  {
    std::set<std::string> seen;
    for (const auto& b : cfg.bands)
      need(seen.insert(b).second, "survey.bands", bands, "distinct suffixes");
  }
  need(cfg.bands.size() != 1, "survey.bands", bands, "two or more suffixes (or none for single-band tiles)");
  if (!detection_band.empty()) {
    auto it = std::find(cfg.bands.begin(), cfg.bands.end(), detection_band);
    need(it != cfg.bands.end(), "survey.detection_band", detection_band, "one of survey.bands");
    cfg.detection_band = static_cast<std::size_t>(it - cfg.bands.begin());
  }
  if (cfg.bands.empty() && !cfg.bands_stage.empty())
    need(false, cfg.bands_stage.begin()->first, cfg.bands_stage.begin()->second,
         "survey.bands being set (bands/forced/maps settings apply to multi-band tiles)");
  for (const char* k : {"bands.freq_mhz", "output.name"})
    need(!cfg.bands_stage.count(k), k, cfg.bands_stage.count(k) ? cfg.bands_stage[k] : "",
         "being unset (frequencies come from the band headers; outputs are named after the tile)");
  cfg.tile_patterns = split_list(tiles);
  for (const auto& r : split_list(retired)) cfg.retired_tiles.insert(r);
  check_survey_settings(cfg, path);
  cfg.output_root = absolute_from(cfg.base_dir, output);
  cfg.catalogue = catalogue;
  cfg.engine = engine;
  cfg.workers = workers;
  cfg.threads_per_tile = tpt;
  cfg.merge.partition_order = order;
  cfg.merge.match_radius_arcsec = radius;
  cfg.merge.margin_match_radii = margin;
  cfg.merge.designation_prefix = prefix;
  // One key for one thing: the tiles' extract runs name their sources with the same prefix.
  if (!vm["catalogue.designation_prefix"].defaulted()) cfg.extract["catalogue.designation_prefix"] = prefix;
  try {
    survey::validate(cfg.merge);
  } catch (const std::invalid_argument& e) {
    throw UsageError(path + ": survey." + e.what());
  }
  // What changes a tile's results: the per-tile command and its settings.
  std::ostringstream h;
  h << "skerry-survey-tile-v1\ncommand=extract\n";
  for (const auto& [k, v] : cfg.extract) h << k << "=" << v << "\n";
  if (!cfg.bands.empty()) {
    // Multi-band tiles (the single-band hash stays as it was).
    h << "command=bands\nbands=";
    for (const auto& b : cfg.bands) h << b << ",";
    h << "\ndetection_band=" << cfg.bands[cfg.detection_band] << "\n";
    for (const auto& [k, v] : cfg.bands_stage) h << k << "=" << v << "\n";
  }
  const std::string ht = h.str();
  cfg.config_sha256 = sha256_hex(ht.data(), ht.size());
  // The merge settings that change the catalogue (not the partition order).
  std::ostringstream m;
  m.precision(17);
  m << "match_radius_arcsec=" << radius << ";margin_match_radii=" << margin << ";prefix=" << prefix
    << ";ra=" << cfg.ra_column << ";dec=" << cfg.dec_column << ";name=" << cfg.name << ";catalogue=" << catalogue;
  cfg.merge_settings = m.str();
  return cfg;
}

std::vector<std::string> tile_band_files(const SurveyConfig& cfg, const TileInput& tile) {
  if (cfg.bands.empty()) return {tile.image};
  const fs::path p(tile.image);
  const std::string fname = p.filename().string();
  const std::string& suf = cfg.bands[cfg.detection_band];
  // fname = NAME + SUFFIX + extension(s); discover_tiles made NAME from the stem.
  const std::string rest = fname.substr(tile.name.size() + suf.size());
  std::vector<std::string> out;
  for (const auto& b : cfg.bands) out.push_back((p.parent_path() / (tile.name + b + rest)).string());
  return out;
}

std::vector<TileInput> discover_tiles(const SurveyConfig& cfg) {
  std::vector<TileInput> out;
  std::set<std::string> seen_paths;
  for (const auto& pat : cfg.tile_patterns) {
    const std::string abs = absolute_from(cfg.base_dir, pat);
    const bool wild = pat.find_first_of("*?[") != std::string::npos;
    std::vector<std::string> found;
    if (wild) {
      glob_t g{};
      const int rc = ::glob(abs.c_str(), 0, nullptr, &g);
      if (rc == 0)
        for (std::size_t i = 0; i < g.gl_pathc; ++i) found.emplace_back(g.gl_pathv[i]);
      ::globfree(&g);
    } else {
      std::error_code ec;
      if (!fs::is_regular_file(abs, ec))
        throw UsageError(cfg.config_path + ": survey.tiles lists " + pat + ", which is not a file");
      found.push_back(abs);
    }
    std::size_t matched = 0;
    for (auto& f : found) {
      const std::string fname = fs::path(f).filename().string();
      if (fname.empty() || fname[0] == '.') continue;  // hidden and temporary files are not tiles
      std::error_code ec;
      if (!fs::is_regular_file(f, ec)) continue;
      if (!seen_paths.insert(f).second) continue;
      std::string stem = fs::path(f).stem().string();
      if (fs::path(f).extension() == ".gz" || fs::path(f).extension() == ".fz") stem = fs::path(stem).stem().string();
      if (!cfg.bands.empty()) {
        // Multi-band: a tile is a detection-band file; the name drops the suffix.
        const std::string& suf = cfg.bands[cfg.detection_band];
        if (stem.size() <= suf.size() || !stem.ends_with(suf)) continue;
        stem = stem.substr(0, stem.size() - suf.size());
      }
      ++matched;  // a retired tile counts as matched: the pattern is not empty
      if (cfg.retired_tiles.count(stem)) continue;
      out.push_back({stem, f});
    }
    // A pattern that matches nothing (a renamed folder, an unmounted disk) is a
    // configuration error before anything is written: treating it as "no
    // tiles" would drop every tile's rows from the catalogue.
    if (matched == 0)
      throw UsageError(cfg.config_path + ": survey.tiles pattern '" + pat + "' matches no tile image (" + abs + ")");
  }
  std::sort(out.begin(), out.end(), [](const TileInput& a, const TileInput& b) { return a.name < b.name; });
  for (std::size_t i = 1; i < out.size(); ++i)
    if (out[i].name == out[i - 1].name)
      throw UsageError(cfg.config_path + ": tiles " + out[i - 1].image + " and " + out[i].image +
                       " have the same name '" + out[i].name + "'");
  return out;
}

}  // namespace skerry::surveyrun
