#include "client/sim/frame_maker.h"

namespace slopecast::sim {

SpotFrameMaker::SpotFrameMaker(const SpotFieldSettings& field, const DetectorModel& detector,
                               const core::CameraSpec& camera, double background_e_per_px, std::uint64_t seed,
                               OffsetRule offsets)
    : field_(field), detector_(detector), camera_(camera), background_(background_e_per_px), rng_(seed),
      rule_(std::move(offsets)) {}

void SpotFrameMaker::make(std::uint64_t k, std::vector<std::byte>& pixels, SubapertureTruth& truth) {
  SpotOffsets offsets = rule_ ? rule_(k) : draw_offsets(field_, rng_);
  std::vector<double> expected = render_spot_field(field_, offsets, camera_.width_px, camera_.height_px);
  if (background_ > 0.0)
    for (double& v : expected) v += background_;
  adu_.resize(expected.size());
  expose_adu(expected, detector_, rng_, adu_, camera_.format != core::PixelFormat::kF32);
  pixels = encode_pixels(adu_, camera_.format);
  truth.illuminated.assign(offsets.dx_px.size(), 1.0);
  truth.dx_px = std::move(offsets.dx_px);
  truth.dy_px = std::move(offsets.dy_px);
}

TurbulenceFrameMaker::TurbulenceFrameMaker(TurbulenceSim& simulator, const DetectorModel& detector,
                                           const core::CameraSpec& camera, std::uint64_t seed)
    : sim_(simulator), detector_(detector), camera_(camera), rng_(seed),
      expected_(static_cast<std::size_t>(camera.width_px) * camera.height_px), adu_(expected_.size()) {}

void TurbulenceFrameMaker::make(std::uint64_t k, std::vector<std::byte>& pixels, SubapertureTruth& truth) {
  sim_.render(k, expected_, camera_.width_px, camera_.height_px, truth);
  expose_adu(expected_, detector_, rng_, adu_, camera_.format != core::PixelFormat::kF32);
  pixels = encode_pixels(adu_, camera_.format);
}

}  // namespace slopecast::sim
