#include "client/sim/frame_bank.h"

namespace slopecast::sim {

FrameBank make_frame_bank(const SpotFieldSettings& field, const DetectorModel& detector, int width,
                          int height, int count, std::uint64_t seed) {
  std::mt19937_64 rng(seed);
  FrameBank bank;
  bank.width = width;
  bank.height = height;
  bank.frames.reserve(count);
  bank.truth.reserve(count);
  for (int k = 0; k < count; ++k) {
    SpotOffsets offsets = draw_offsets(field, rng);
    const std::vector<double> expected = render_spot_field(field, offsets, width, height);
    std::vector<std::uint16_t> frame(expected.size());
    expose(expected, detector, rng, frame);
    bank.frames.push_back(std::move(frame));
    bank.truth.push_back(std::move(offsets));
  }
  return bank;
}

std::vector<float> make_mean_dark(const DetectorModel& detector, int width, int height, int n,
                                  std::uint64_t seed) {
  std::mt19937_64 rng(seed);
  const std::vector<double> nothing(static_cast<std::size_t>(width) * height, 0.0);
  std::vector<double> sum(nothing.size(), 0.0);
  std::vector<std::uint16_t> frame(nothing.size());
  for (int k = 0; k < n; ++k) {
    expose(nothing, detector, rng, frame);
    for (std::size_t i = 0; i < frame.size(); ++i) sum[i] += frame[i];
  }
  std::vector<float> mean(sum.size());
  for (std::size_t i = 0; i < sum.size(); ++i) mean[i] = static_cast<float>(sum[i] / n);
  return mean;
}

}  // namespace slopecast::sim
