#pragma once
/// Command-line and configuration-file handling shared by every sub-command.
///
/// Options are named `section.key` (e.g. `detect.peak_snr`). A configuration file
/// (INI style, `--config FILE`) holds `[section]` blocks of `key = value`; the
/// command line overrides it (`--detect.peak_snr 6`). Unknown keys, misspelt
/// options and values of the wrong type are errors that name the option.
#include <boost/program_options.hpp>
#include <map>
#include <string>
#include <vector>

namespace skerry {

namespace po = boost::program_options;

struct ParsedOptions {
  po::variables_map vm;
  /// Every option of the description with its resolved value as text, sorted by
  /// name (for run records and configuration hashes).
  std::map<std::string, std::string> resolved;
  std::string config_file;  ///< empty when none was given
  bool help = false;
};

/// How a command uses the common options: one meaning per option in its --help.
struct CommonOptions {
  /// Description of --threads; empty = "worker threads (0 = all cores)".
  std::string threads_help;
  /// Offer --config FILE (off for a command whose positional argument is
  /// already its configuration).
  bool config = true;
};

/// Parse `args` against `desc` (plus the common --help, --config, --threads).
/// `positional` names the options that take positional arguments, in order; the
/// last may take any number (-1). When --help is given, prints usage to stdout
/// and sets help=true. Throws UsageError with a one-line message otherwise.
ParsedOptions parse_options(const std::string& command, const std::string& usage_line,
                            const po::options_description& desc,
                            const std::vector<std::pair<std::string, int>>& positional,
                            const std::vector<std::string>& args, const CommonOptions& common_options = {});

/// Apply --threads (0 = all cores) for the lifetime of the returned object.
class ThreadLimit {
 public:
  explicit ThreadLimit(int threads);
  ~ThreadLimit();
  ThreadLimit(const ThreadLimit&) = delete;
  ThreadLimit& operator=(const ThreadLimit&) = delete;
  int threads() const { return threads_; }

 private:
  void* control_ = nullptr;
  int threads_ = 0;
};

/// Throws UsageError("OPTION = VALUE breaks RULE") unless ok.
void require(bool ok, const std::string& option, const std::string& value, const std::string& rule);

}  // namespace skerry
