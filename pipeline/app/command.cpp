#include "app/command.h"

namespace skerry {
std::vector<CommandInfo>& command_registry() {
  static std::vector<CommandInfo> r;
  return r;
}
}  // namespace skerry
