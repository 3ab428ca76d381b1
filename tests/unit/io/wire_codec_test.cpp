// The wire contract: golden bytes, decoding untrusted headers, encoding
// measurements.
#include <catch2/catch.hpp>

#include <cmath>

#include "daemon/io/wire_codec.h"

using namespace slopecast;

namespace {
std::span<const std::byte> as_span(const std::string& s) {
  return {reinterpret_cast<const std::byte*>(s.data()), s.size()};
}
}  // namespace

TEST_CASE("a frame header has the golden wire bytes", "[wire]") {
  // Expected bytes worked out by hand from the Protocol Buffers encoding
  // rules (tag = field_number << 3 | wire_type 0 for varints; varint 240 =
  // F0 01): a change here breaks every camera adapter in the field.
  v1::FrameHeader h;
  h.set_contract_version(1);
  h.set_seq(5);
  h.set_width_px(240);
  h.set_height_px(240);
  h.set_pixel_type(v1::PIXEL_TYPE_U16);
  const std::string expected("\x08\x01\x10\x05\x20\xF0\x01\x28\xF0\x01\x30\x02", 12);
  CHECK(h.SerializeAsString() == expected);

  v1::FrameHeader scratch;
  const auto facts = io::decode_frame_header(as_span(expected), scratch);
  REQUIRE(facts);
  CHECK(facts->width_px == 240);
  CHECK(facts->height_px == 240);
  CHECK(facts->pixel_format == core::PixelFormat::kU16);
  CHECK(scratch.seq() == 5);
}

TEST_CASE("untrusted header bytes are refused or marked", "[wire]") {
  v1::FrameHeader scratch;
  SECTION("garbage text does not parse") {
    CHECK_FALSE(io::decode_frame_header(as_span("this is not a protobuf"), scratch));
  }
  SECTION("an empty message parses but lacks the contract version") {
    CHECK_FALSE(io::decode_frame_header(as_span(""), scratch));
  }
  SECTION("a future contract version is refused") {
    v1::FrameHeader h;
    h.set_contract_version(2);
    h.set_width_px(4);
    CHECK_FALSE(io::decode_frame_header(as_span(h.SerializeAsString()), scratch));
  }
  SECTION("an unknown pixel type code decodes without a format") {
    // Field 6 = 9: tag 0x30, value 0x09 (an enum value this contract lacks).
    const std::string bytes("\x08\x01\x20\x04\x28\x04\x30\x09", 8);
    const auto facts = io::decode_frame_header(as_span(bytes), scratch);
    REQUIRE(facts);
    CHECK_FALSE(facts->pixel_format);
  }
  SECTION("a truncated varint does not parse") {
    CHECK_FALSE(io::decode_frame_header(as_span(std::string("\x08\x01\x20\xF0", 4)), scratch));
  }
}

TEST_CASE("a measurement round-trips with packed arrays and validity", "[wire]") {
  core::FrameMeasurement m;
  m.resize(3);
  m.slope_x_px = {0.25f, 0.0f, -1.5f};
  m.slope_y_px = {-0.125f, 0.0f, 2.0f};
  m.flux_adu = {1000.0f, 12.0f, 900.0f};
  m.peak_adu = {200.0f, 3.0f, 150.0f};
  m.flags = {core::kFlagNone, core::kFlagLowFlux, core::kFlagNone};
  m.n_valid = 2;
  m.slope_rms_x_px = 1.0f;
  io::MeasurementStamp stamp;
  stamp.frame_seq = 77;
  stamp.camera_time_ns = 1'700'000'000'000'000'000ull;
  stamp.received_time_ns = stamp.camera_time_ns + 1000;
  stamp.published_time_ns = stamp.camera_time_ns + 2000;
  stamp.n_subap_x = 3;
  stamp.n_subap_y = 1;
  stamp.centroid_us = 12.5f;
  v1::Measurement msg;
  io::encode_measurement(m, stamp, msg);
  const std::string bytes = msg.SerializeAsString();

  v1::Measurement back;
  REQUIRE(back.ParseFromString(bytes));
  CHECK(back.contract_version() == 1);
  CHECK(back.frame_seq() == 77);
  CHECK(back.published_time_ns() - back.received_time_ns() == 1000);
  CHECK(back.centroider() == v1::CENTROIDER_COG);
  CHECK(back.slope_unit() == v1::SLOPE_UNIT_PX);
  REQUIRE(back.slope_x_size() == 3);
  CHECK(back.slope_x(2) == -1.5f);
  CHECK(back.valid(0));
  CHECK_FALSE(back.valid(1));
  CHECK(back.flags(1) == v1::SUBAPERTURE_FLAG_LOW_FLUX);
  CHECK(back.n_valid() == 2);
  CHECK(back.stage_times().centroid_us() == 12.5f);

  CHECK(back.units_per_px() == 1.0);

  // In physical units: slopes and their rms scaled, the unit and the factor
  // on the message (10 um pixels, 5 mm lenslet focal length, 150 um pitch:
  // 300 nm per px, tests/unit/core/calibration_test).
  stamp.slope_unit = core::SlopeUnit::kNm;
  stamp.units_per_px = 300.0;
  io::encode_measurement(m, stamp, msg);
  CHECK(msg.slope_unit() == v1::SLOPE_UNIT_NM);
  CHECK(msg.units_per_px() == 300.0);
  CHECK(msg.slope_x(0) == 75.0f);
  CHECK(msg.slope_y(2) == 600.0f);
  CHECK(msg.slope_rms_x() == 300.0f);
  CHECK(msg.flux_adu(0) == 1000.0f);  // everything else stays as it was
  stamp.slope_unit = core::SlopeUnit::kPx;
  stamp.units_per_px = 1.0;

  // Reusing the message for a smaller frame leaves no stale entries.
  m.resize(2);
  io::encode_measurement(m, stamp, msg);
  CHECK(msg.slope_x_size() == 2);
  CHECK(msg.valid_size() == 2);
}

TEST_CASE("the masked flag keeps its wire value", "[wire]") {
  CHECK(static_cast<int>(core::kFlagMasked) == v1::SUBAPERTURE_FLAG_MASKED);
  CHECK(static_cast<int>(core::kFlagNarrow) == v1::SUBAPERTURE_FLAG_NARROW);
  CHECK(static_cast<int>(core::kFlagNegativePixel) == v1::SUBAPERTURE_FLAG_NEGATIVE_PIXEL);
}

TEST_CASE("pixel type codes map both ways", "[wire]") {
  for (auto f : {core::PixelFormat::kU8, core::PixelFormat::kU16, core::PixelFormat::kU32, core::PixelFormat::kF32})
    CHECK(io::from_wire(io::to_wire(f)) == f);
  CHECK_FALSE(io::from_wire(v1::PIXEL_TYPE_UNSPECIFIED));
  CHECK_FALSE(io::from_wire(42));
}
