// Header-versus-payload checks: a frame is refused before a pixel is read.
#include <catch2/catch.hpp>

#include <set>
#include <vector>

#include "daemon/core/frame/frame_check.h"

using namespace slopecast::core;

namespace {
const CameraSpec kCamera{32, 24, PixelFormat::kU16};

FrameFacts good_facts() {
  FrameFacts f;
  f.width_px = 32;
  f.height_px = 24;
  f.pixel_format = PixelFormat::kU16;
  f.row_stride_bytes = 0;
  return f;
}
}  // namespace

TEST_CASE("a frame matching the camera becomes an image view", "[frame_check]") {
  std::vector<std::byte> payload(32 * 24 * 2);
  const auto r = check_frame(good_facts(), payload, kCamera);
  REQUIRE(r.image);
  CHECK(r.image->width == 32);
  CHECK(r.image->height == 24);
  CHECK(r.image->row_stride_bytes == 64);  // 0 on the wire means packed
  CHECK(r.image->data.data() == payload.data());  // a view, not a copy
}

TEST_CASE("a padded row stride is honoured", "[frame_check]") {
  FrameFacts f = good_facts();
  f.row_stride_bytes = 80;
  std::vector<std::byte> payload(80 * 24);
  const auto r = check_frame(f, payload, kCamera);
  REQUIRE(r.image);
  CHECK(r.image->row_stride_bytes == 80);
}

TEST_CASE("each mismatch is refused with its own reason", "[frame_check]") {
  std::vector<std::byte> payload(32 * 24 * 2);
  FrameFacts f = good_facts();
  FrameReject expected = FrameReject::kPartCount;
  SECTION("unknown pixel type") {
    f.pixel_format.reset();
    expected = FrameReject::kUnknownPixelType;
  }
  SECTION("pixel type other than configured") {
    f.pixel_format = PixelFormat::kU8;
    payload.resize(32 * 24);
    expected = FrameReject::kPixelTypeMismatch;
  }
  SECTION("width differs") {
    f.width_px = 33;
    payload.resize(33 * 24 * 2);
    expected = FrameReject::kDimensionsMismatch;
  }
  SECTION("height differs") {
    f.height_px = 23;
    expected = FrameReject::kDimensionsMismatch;
  }
  SECTION("stride shorter than a row") {
    f.row_stride_bytes = 63;
    expected = FrameReject::kBadStride;
  }
  SECTION("payload one byte short") {
    payload.pop_back();
    expected = FrameReject::kPayloadSize;
  }
  SECTION("payload one byte long") {
    payload.emplace_back();
    expected = FrameReject::kPayloadSize;
  }
  SECTION("empty payload") {
    payload.clear();
    expected = FrameReject::kPayloadSize;
  }
  const auto r = check_frame(f, payload, kCamera);
  CHECK_FALSE(r.image);
  CHECK(r.reject == expected);
}

TEST_CASE("reject reasons have stable distinct names", "[frame_check]") {
  std::set<std::string_view> names;
  for (FrameReject r : kAllFrameRejects) names.insert(frame_reject_name(r));
  CHECK(names.size() == kFrameRejectCount);
  CHECK(frame_reject_name(FrameReject::kPayloadSize) == "payload_size");
}
