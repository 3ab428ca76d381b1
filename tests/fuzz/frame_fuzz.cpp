// Fuzz target: one frame message as the daemon receives it. The first byte
// picks a camera (pixel type, size, method), two little-endian bytes split
// the rest into header and payload; the header is decoded, checked against
// the payload and the camera, and an accepted frame is measured. Every
// published value must be finite.
#include <cmath>
#include <cstdint>
#include <cstdlib>
#include <map>
#include <memory>

#include "daemon/core/frame/frame_check.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/wire_codec.h"

using namespace slopecast;

namespace {
core::Pipeline& pipeline_for(int k) {
  static std::map<int, std::unique_ptr<core::Pipeline>> made;
  auto& p = made[k];
  if (!p) {
    const core::PixelFormat formats[] = {core::PixelFormat::kU8, core::PixelFormat::kU16, core::PixelFormat::kU32,
                                         core::PixelFormat::kF32};
    core::PipelineSettings s;
    s.camera = {12, 12, formats[k % 4]};
    s.grid = {2, 2, 6, 0, 0};
    s.centroider.kind = (k / 4) % 2 ? core::CentroiderKind::kWeighted : core::CentroiderKind::kCog;
    s.centroider.spot_sigma_px = 1.0;
    p = std::make_unique<core::Pipeline>(s);
  }
  return *p;
}
}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  if (size < 3) return 0;
  const int k = data[0] % 8;
  const std::size_t split = std::min<std::size_t>(size - 3, data[1] | (data[2] << 8));
  const auto* bytes = reinterpret_cast<const std::byte*>(data + 3);
  core::Pipeline& pipe = pipeline_for(k);
  v1::FrameHeader header;
  const auto facts = io::decode_frame_header({bytes, split}, header);
  if (!facts) return 0;
  const auto checked = core::check_frame(*facts, {bytes + split, size - 3 - split}, pipe.settings().camera);
  if (!checked.image) return 0;
  auto m = pipe.make_measurement();
  pipe.measure(*checked.image, m);
  for (int i = 0; i < m.size(); ++i)
    if (!std::isfinite(m.slope_x_px[i]) || !std::isfinite(m.flux_adu[i]) || !std::isfinite(m.snr[i])) std::abort();
  return 0;
}
