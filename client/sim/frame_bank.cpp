#include "client/sim/frame_bank.h"

#include "client/sim/frame_maker.h"

namespace slopecast::sim {

FrameBank make_frame_bank(const SpotFieldSettings& field, const DetectorModel& detector,
                          const core::CameraSpec& camera, double background_e_per_px, int count,
                          std::uint64_t seed, const KeepGoing& keep_going) {
  SpotFrameMaker maker(field, detector, camera, background_e_per_px, seed);
  FrameBank bank;
  bank.camera = camera;
  bank.frames.reserve(count);
  bank.truth.reserve(count);
  SubapertureTruth truth;
  for (int k = 0; k < count && keep_going(); ++k) {
    maker.make(static_cast<std::uint64_t>(k), bank.frames.emplace_back(), truth);
    bank.truth.push_back(SpotOffsets{std::move(truth.dx_px), std::move(truth.dy_px)});
  }
  return bank;
}

FrameBank make_static_bank(const std::vector<double>& expected_e, const DetectorModel& detector,
                           const core::CameraSpec& camera, int count, std::uint64_t seed, const KeepGoing& keep_going) {
  std::mt19937_64 rng(seed);
  FrameBank bank;
  bank.camera = camera;
  bank.frames.reserve(count);
  const bool integer = camera.format != core::PixelFormat::kF32;
  std::vector<double> adu(expected_e.size());
  for (int k = 0; k < count && keep_going(); ++k) {
    expose_adu(expected_e, detector, rng, adu, integer);
    bank.frames.push_back(encode_pixels(adu, camera.format));
  }
  return bank;
}

FrameBank make_turbulence_bank(TurbulenceSim& simulator, const DetectorModel& detector,
                               const core::CameraSpec& camera, int count, std::uint64_t seed,
                               const KeepGoing& keep_going) {
  TurbulenceFrameMaker maker(simulator, detector, camera, seed);
  FrameBank bank;
  bank.camera = camera;
  SubapertureTruth truth;
  for (int k = 0; k < count && keep_going(); ++k) {
    maker.make(static_cast<std::uint64_t>(k), bank.frames.emplace_back(), truth);
    bank.truth.push_back(SpotOffsets{truth.dx_px, truth.dy_px});
    bank.illuminated.push_back(truth.illuminated);
  }
  return bank;
}

std::vector<float> make_mean_dark(const DetectorModel& detector, int width, int height, int n,
                                  std::uint64_t seed, const KeepGoing& keep_going) {
  std::mt19937_64 rng(seed);
  const std::vector<double> nothing(static_cast<std::size_t>(width) * height, 0.0);
  std::vector<double> sum(nothing.size(), 0.0), frame(nothing.size());
  for (int k = 0; k < n; ++k) {
    if (!keep_going()) return {};
    expose_adu(nothing, detector, rng, frame);
    for (std::size_t i = 0; i < frame.size(); ++i) sum[i] += frame[i];
  }
  std::vector<float> mean(sum.size());
  for (std::size_t i = 0; i < sum.size(); ++i) mean[i] = static_cast<float>(sum[i] / n);
  return mean;
}

}  // namespace slopecast::sim
