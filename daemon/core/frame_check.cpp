#include "daemon/core/frame_check.h"

namespace slopecast::core {

std::string_view frame_reject_name(FrameReject r) {
  switch (r) {
    case FrameReject::kPartCount: return "part_count";
    case FrameReject::kBadHeader: return "bad_header";
    case FrameReject::kUnknownPixelType: return "unknown_pixel_type";
    case FrameReject::kPixelTypeMismatch: return "pixel_type_mismatch";
    case FrameReject::kDimensionsMismatch: return "dimensions_mismatch";
    case FrameReject::kBadStride: return "bad_stride";
    case FrameReject::kPayloadSize: return "payload_size";
  }
  return "?";
}

FrameCheckResult check_frame(const FrameFacts& facts, std::span<const std::byte> payload,
                             const CameraSpec& camera) {
  auto refuse = [](FrameReject r) { return FrameCheckResult{std::nullopt, r}; };
  if (!facts.pixel_format) return refuse(FrameReject::kUnknownPixelType);
  if (*facts.pixel_format != camera.format) return refuse(FrameReject::kPixelTypeMismatch);
  if (facts.width_px != static_cast<std::uint32_t>(camera.width_px) ||
      facts.height_px != static_cast<std::uint32_t>(camera.height_px))
    return refuse(FrameReject::kDimensionsMismatch);
  // Widths are bounded by validate(CameraSpec), so these products fit easily.
  const std::size_t row_bytes = facts.width_px * bytes_per_pixel(camera.format);
  const std::size_t stride = facts.row_stride_bytes == 0 ? row_bytes : facts.row_stride_bytes;
  if (stride < row_bytes) return refuse(FrameReject::kBadStride);
  if (payload.size() != stride * facts.height_px) return refuse(FrameReject::kPayloadSize);
  ImageView view{payload, camera.width_px, camera.height_px, stride, camera.format};
  return FrameCheckResult{view, FrameReject::kPartCount};
}

}  // namespace slopecast::core
