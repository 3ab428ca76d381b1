#include "daemon/core/frame/frame_check.h"

#include <fmt/format.h>

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

std::string describe_reject(FrameReject reason, const RejectedFrame& r, const CameraSpec& camera) {
  const FrameFacts& f = r.facts;
  const auto type = f.pixel_format ? std::string(pixel_format_name(*f.pixel_format))
                                   : fmt::format("pixel type code {}", f.pixel_type_code);
  const auto expected = fmt::format("{} x {} {}", camera.width_px, camera.height_px, pixel_format_name(camera.format));
  switch (reason) {
    case FrameReject::kPartCount:
      return fmt::format("{} message part(s), expected 2 (header, pixels)", r.parts);
    case FrameReject::kBadHeader:
      return fmt::format("a {}-byte header that is not a slopecast.v1.FrameHeader with contract_version 1",
                         r.header_bytes);
    case FrameReject::kUnknownPixelType:
      return fmt::format("pixel type code {} (known: 1 u8, 2 u16, 3 u32, 4 f32; 0 means unset)", f.pixel_type_code);
    case FrameReject::kPixelTypeMismatch:
    case FrameReject::kDimensionsMismatch:
      return fmt::format("{} x {} {}, expected {}", f.width_px, f.height_px, type, expected);
    case FrameReject::kBadStride:
      return fmt::format("row_stride_bytes {}, but a row of {} {} pixels needs {}", f.row_stride_bytes,
                         f.width_px, type, f.width_px * bytes_per_pixel(camera.format));
    case FrameReject::kPayloadSize: {
      const std::size_t stride =
          f.row_stride_bytes ? f.row_stride_bytes : f.width_px * bytes_per_pixel(camera.format);
      return fmt::format("a {}-byte pixel part, the header implies {} ({} rows of {} bytes)", r.payload_bytes,
                         stride * f.height_px, f.height_px, stride);
    }
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
