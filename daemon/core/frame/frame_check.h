// Deciding whether a frame may be read, before a single pixel is touched.
//
// The io layer decodes the header into FrameFacts; check_frame() compares
// them with the configured camera and the payload size. Only a frame that
// passes becomes an ImageView.
#pragma once

#include <array>
#include <cstddef>
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>

#include "daemon/core/frame/image_view.h"
#include "daemon/core/geometry/sensor_geometry.h"

namespace slopecast::core {

// Why a frame was refused. Values and order match slopecast.v1.RejectReason
// (minus UNSPECIFIED), so that counts can be reported by index.
enum class FrameReject : std::uint8_t {
  kPartCount = 0,         // not exactly header + pixels
  kBadHeader,             // header does not parse or has the wrong contract version
  kUnknownPixelType,      // pixel type code we do not know
  kPixelTypeMismatch,     // known type, not the configured one
  kDimensionsMismatch,    // width/height differ from the configured camera
  kBadStride,             // row stride shorter than one row of pixels
  kPayloadSize,           // pixel part size != row stride * height
};
inline constexpr std::size_t kFrameRejectCount = 7;
inline constexpr std::array<FrameReject, kFrameRejectCount> kAllFrameRejects = {
    FrameReject::kPartCount,         FrameReject::kBadHeader,
    FrameReject::kUnknownPixelType,  FrameReject::kPixelTypeMismatch,
    FrameReject::kDimensionsMismatch, FrameReject::kBadStride,
    FrameReject::kPayloadSize};

// Stable lower-case name ("payload_size", ...) for logs and status replies.
std::string_view frame_reject_name(FrameReject r);

// What the header claims. pixel_format is nullopt when the wire code is not
// a known format.
struct FrameFacts {
  std::uint32_t width_px = 0;
  std::uint32_t height_px = 0;
  std::optional<PixelFormat> pixel_format;
  std::uint32_t pixel_type_code = 0;   // the wire code, kept for messages
  std::uint32_t row_stride_bytes = 0;  // 0 = tightly packed
};

// What a rejected frame looked like, kept (by value, no allocation) so that
// logs and status can say what arrived against what was expected.
struct RejectedFrame {
  FrameFacts facts;            // meaningful from kUnknownPixelType on
  std::size_t parts = 0;       // message parts received
  std::size_t header_bytes = 0;
  std::size_t payload_bytes = 0;
};

// One line: what arrived and what was expected, e.g. "256 x 256 u16,
// expected 240 x 240 u16".
std::string describe_reject(FrameReject reason, const RejectedFrame& frame, const CameraSpec& camera);

// Either a view over payload that is safe to read, or the reason it is not.
struct FrameCheckResult {
  std::optional<ImageView> image;
  FrameReject reject = FrameReject::kPartCount;  // meaningful only when !image
};

// Checks, in this order: pixel type known, pixel type as configured,
// dimensions as configured, stride covers a row, payload size equals
// stride * height. Never reads the payload's contents.
FrameCheckResult check_frame(const FrameFacts& facts, std::span<const std::byte> payload,
                             const CameraSpec& camera);

}  // namespace slopecast::core
