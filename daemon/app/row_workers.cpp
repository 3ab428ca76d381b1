#include "daemon/app/row_workers.h"

#include <algorithm>
#include <cassert>

namespace slopecast::app {

RowWorkers::RowWorkers(int threads) : threads_(std::max(threads, 1)) {
  for (int lane = 1; lane < threads_; ++lane) helpers_.emplace_back([this, lane] { helper(lane); });
}

RowWorkers::~RowWorkers() {
  stop_.store(true);
  generation_.fetch_add(1);
  generation_.notify_all();
  for (auto& t : helpers_) t.join();
}

void RowWorkers::band(int lane) {
  const int rows = pipeline_->run_count();
  const int per = (rows + threads_ - 1) / threads_;
  const int begin = std::min(rows, lane * per), end = std::min(rows, begin + per);
  if (begin < end) pipeline_->measure_runs(image_, begin, end, lane);
}

void RowWorkers::helper(int lane) {
  std::uint64_t seen = 0;
  for (;;) {
    generation_.wait(seen);
    seen = generation_.load();
    if (stop_.load()) return;
    band(lane);
    if (pending_.fetch_sub(1) == 1) pending_.notify_one();
  }
}

void RowWorkers::measure_rows(core::Pipeline& pipeline, const core::ImageView& image) {
  assert(pipeline.lanes() >= threads_);
  pipeline_ = &pipeline;
  image_ = image;
  if (threads_ == 1) return band(0);
  pending_.store(threads_ - 1);
  // Publishes the job (the stores above happen before this release) and
  // wakes the helpers.
  generation_.fetch_add(1, std::memory_order_acq_rel);
  generation_.notify_all();
  band(0);
  for (int left = pending_.load(); left != 0; left = pending_.load()) pending_.wait(left);
}

}  // namespace slopecast::app
