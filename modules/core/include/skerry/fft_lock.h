#pragma once
/// One lock for FFTW's planner in the whole process. FFTW's planner (plan
/// creation and destruction) is not thread-safe, execution of a plan is (FFTW
/// 3.3 manual, section 5.4 "Thread safety"). Every module that makes or destroys
/// FFTW plans takes this lock, so that two modules planning on two threads at
/// once (the simulator and the convolution for common resolution, say) cannot
/// race in FFTW's shared planner state.
#include <mutex>

namespace skerry {

std::mutex& fftw_planner_mutex();

}  // namespace skerry
