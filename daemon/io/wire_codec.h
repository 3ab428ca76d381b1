// Translation between the wire contract (proto/slopecast/v1) and core structs.
//
// The decode side never trusts its input: a header that does not parse, or
// that lacks contract_version = 1, gives nullopt; a pixel-type code that is
// not one we know gives FrameFacts with no pixel_format (reported as
// unknown_pixel_type, not as a bad header).
#pragma once

#include <cstdint>
#include <optional>
#include <span>

#include "daemon/core/centroid/centroider_settings.h"
#include "daemon/core/frame/frame_check.h"
#include "daemon/core/calibration/slope_units.h"
#include "daemon/core/pipeline/frame_measurement.h"
#include "slopecast/v1/control.pb.h"
#include "slopecast/v1/frame.pb.h"
#include "slopecast/v1/measurement.pb.h"

namespace slopecast::io {

inline constexpr std::uint32_t kContractVersion = 1;

// Parses bytes into scratch (reused between frames, so its string capacity is
// kept) and extracts the facts check_frame() needs.
std::optional<core::FrameFacts> decode_frame_header(std::span<const std::byte> bytes,
                                                    v1::FrameHeader& scratch);

v1::PixelType to_wire(core::PixelFormat f);
v1::Centroider to_wire(core::CentroiderKind k);
v1::SlopeUnit to_wire(core::SlopeUnit u);
std::optional<core::PixelFormat> from_wire(int pixel_type_code);

// Facts about the frame that the measurement carries besides the arrays.
struct MeasurementStamp {
  std::uint64_t frame_seq = 0;
  std::uint64_t camera_time_ns = 0;
  std::uint64_t received_time_ns = 0;
  std::uint64_t published_time_ns = 0;
  int n_subap_x = 0;
  int n_subap_y = 0;
  core::CentroiderKind centroider = core::CentroiderKind::kCog;
  std::uint32_t settings_generation = 1;
  // Published slopes are the pipeline's px times units_per_px, in slope_unit.
  core::SlopeUnit slope_unit = core::SlopeUnit::kPx;
  double units_per_px = 1.0;
  float check_us = 0.0f;
  float centroid_us = 0.0f;
};

// A centroider option as a control message field, and back (nullopt when
// the option carries no value).
void to_wire(const std::string& key, const core::OptionValue& value, v1::CentroiderOption& out);
std::optional<core::OptionValue> from_wire(const v1::CentroiderOption& option);
// The whole centroider in force, for replies.
void describe_centroider(const core::CentroiderSettings& s, std::uint32_t generation, v1::CentroiderReply& out);

// Fills msg from m and stamp. msg is reused between frames: after the first
// frame, its repeated fields already have capacity and this does not allocate.
void encode_measurement(const core::FrameMeasurement& m, const MeasurementStamp& stamp,
                        v1::Measurement& msg);

}  // namespace slopecast::io
