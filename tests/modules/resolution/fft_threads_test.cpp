// The simulator's noise and the common-resolution convolution both plan FFTW
// transforms. FFTW's planner is not thread-safe (FFTW 3.3 manual, section 5.4
// "Thread safety"), so both take one process-wide lock (skerry/fft_lock.h).
// Check: run both on several threads at once, many times, and require every
// result to be bit-identical to the one computed alone (results never depend on
// threads: the house rule). Different lengths on each call make FFTW plan anew.
#include <gtest/gtest.h>

#include <atomic>
#include <chrono>
#include <cstring>
#include <mutex>
#include <cstdint>
#include <thread>
#include <vector>

#include "skerry/fft_lock.h"
#include "skerry/resolution.h"
#include "skerry/simulate.h"

namespace skerry {
namespace {

Eigen::Matrix2d cov(double sx, double sy) {
  Eigen::Matrix2d c;
  c << sx * sx, 0.3 * sx * sy, 0.3 * sx * sy, sy * sy;
  return c;
}

ImageF noise_for(int i) { return sim::correlated_noise(40 + i, 36 + 2 * i, cov(2.5, 2.0), 1.0, 77, i); }

ImageF convolved_for(int i) {
  ImageF img = ImageF::Zero(48 + i, 44 + i);
  img(10, 12) = 1.0f;
  img(20 + i, 30) = -2.0f;
  bool fft = false;
  ImageF out = convolve_gaussian_pixels(img, cov(6.0, 5.0), {}, &fft);
  EXPECT_TRUE(fft) << "the FFT path was not taken: this test would not plan FFTW transforms";
  return out;
}

bool same_bits(const ImageF& a, const ImageF& b) {
  return a.rows() == b.rows() && a.cols() == b.cols() &&
         std::memcmp(a.data(), b.data(), sizeof(float) * static_cast<std::size_t>(a.size())) == 0;
}

TEST(FftPlanner, SimulatorAndConvolutionOnManyThreadsMatchSerialResults) {
  constexpr int kKinds = 12;
  std::vector<ImageF> noise_ref, conv_ref;
  for (int i = 0; i < kKinds; ++i) {
    noise_ref.push_back(noise_for(i));
    conv_ref.push_back(convolved_for(i));
  }
  std::atomic<int> mismatches{0};
  std::vector<std::thread> threads;
  for (int t = 0; t < 4; ++t)
    threads.emplace_back([&, t] {
      for (int round = 0; round < 6; ++round)
        for (int i = 0; i < kKinds; ++i) {
          const int k = (i + 5 * t + round) % kKinds;
          if (t % 2 == 0 ? !same_bits(noise_for(k), noise_ref[k]) : !same_bits(convolved_for(k), conv_ref[k]))
            ++mismatches;
        }
    });
  for (auto& th : threads) th.join();
  EXPECT_EQ(mismatches.load(), 0);
}

TEST(FftPlanner, OneLockForTheWholeProcess) {
  // The simulator and the convolution see the same mutex object.
  EXPECT_EQ(&fftw_planner_mutex(), &fftw_planner_mutex());
  for (const bool simulator : {true, false}) {
    std::unique_lock<std::mutex> held(fftw_planner_mutex());
    std::atomic<bool> done{false};
    std::thread other([&] {
      (void)(simulator ? noise_for(1) : convolved_for(1));  // must wait for the lock held here
      done = true;
    });
    std::this_thread::sleep_for(std::chrono::milliseconds(200));
    EXPECT_FALSE(done.load()) << (simulator ? "the simulator" : "the convolution")
                              << " planned FFTW transforms without the process-wide lock";
    held.unlock();
    other.join();
    EXPECT_TRUE(done.load());
  }
}

}  // namespace
}  // namespace skerry
