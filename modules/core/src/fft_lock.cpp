#include "skerry/fft_lock.h"

namespace skerry {

std::mutex& fftw_planner_mutex() {
  static std::mutex m;
  return m;
}

}  // namespace skerry
