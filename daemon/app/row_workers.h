// Measuring a frame on several threads: the rows of subapertures are split
// into contiguous bands, one per thread, each measured with its own lane of
// the pipeline's scratch (core::Pipeline::measure_rows), and the loop thread
// joins the work as lane 0 rather than waiting idle.
//
// The helper threads are started once and kept; a frame costs two atomic
// notifications and no allocation. With one thread this is exactly
// Pipeline::measure_rows over all rows on the loop thread.
#pragma once

#include <atomic>
#include <cstdint>
#include <thread>
#include <vector>

#include "daemon/core/pipeline/pipeline.h"

namespace slopecast::app {

class RowWorkers {
 public:
  // threads >= 1: the loop thread plus threads - 1 helpers.
  explicit RowWorkers(int threads);
  ~RowWorkers();
  RowWorkers(const RowWorkers&) = delete;
  RowWorkers& operator=(const RowWorkers&) = delete;

  int threads() const { return threads_; }
  // Pass 1 of the pipeline over every row, split across the threads;
  // returns when all rows are done (then call pipeline.finish()).
  // Precondition: pipeline.lanes() >= threads().
  void measure_rows(core::Pipeline& pipeline, const core::ImageView& image);

 private:
  void helper(int lane);
  void band(int lane);

  int threads_;
  std::vector<std::thread> helpers_;
  // The job of the current frame, written before generation_ is bumped.
  core::Pipeline* pipeline_ = nullptr;
  core::ImageView image_{};
  std::atomic<std::uint64_t> generation_{0};
  std::atomic<int> pending_{0};
  std::atomic<bool> stop_{false};
};

}  // namespace slopecast::app
