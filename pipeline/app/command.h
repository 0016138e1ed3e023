#pragma once
/// Sub-command registry. Each pipeline/cmd_*.cpp registers one sub-command:
///
///   static const skerry::CommandRegistrar reg{"extract", "one image -> catalogue", &run_extract};
///
/// run(args) gets the arguments after the sub-command name and returns an exit code
/// (errors.h); it may throw the errors of errors.h, which main() reports.
#include <string>
#include <vector>

namespace skerry {

using CommandFn = int (*)(const std::vector<std::string>& args);

struct CommandInfo {
  std::string name;
  std::string summary;
  CommandFn run;
};

std::vector<CommandInfo>& command_registry();

struct CommandRegistrar {
  CommandRegistrar(std::string name, std::string summary, CommandFn fn) {
    command_registry().push_back({std::move(name), std::move(summary), fn});
  }
};

}  // namespace skerry
