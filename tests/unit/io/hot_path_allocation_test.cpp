// The per-frame path must not allocate (the hot path rules, DEVELOPERS.md).
// This program replaces every form of the global operator new (throwing and
// nothrow, single and array, so that a sanitizer sees matching new/delete
// pairs) with a counting one and runs the pipeline and the measurement
// encoder over many frames.
#include <catch2/catch.hpp>

#include <atomic>
#include <cstdlib>
#include <new>

#include <functional>

#include "client/sim/spot_field.h"
#include "daemon/core/calibration/frame_average.h"
#include "daemon/core/calibration/slope_average.h"
#include "daemon/core/frame/frame_check.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/wire_codec.h"

namespace {
std::atomic<long> g_allocations{0};
}  // namespace

void* operator new(std::size_t n) {
  g_allocations.fetch_add(1, std::memory_order_relaxed);
  if (void* p = std::malloc(n ? n : 1)) return p;
  throw std::bad_alloc();
}
void* operator new(std::size_t n, const std::nothrow_t&) noexcept {
  g_allocations.fetch_add(1, std::memory_order_relaxed);
  return std::malloc(n ? n : 1);
}
void* operator new[](std::size_t n) { return operator new(n); }
void* operator new[](std::size_t n, const std::nothrow_t& t) noexcept { return operator new(n, t); }
void operator delete(void* p) noexcept { std::free(p); }
void operator delete(void* p, std::size_t) noexcept { std::free(p); }
void operator delete(void* p, const std::nothrow_t&) noexcept { std::free(p); }
void operator delete[](void* p) noexcept { std::free(p); }
void operator delete[](void* p, std::size_t) noexcept { std::free(p); }
void operator delete[](void* p, const std::nothrow_t&) noexcept { std::free(p); }

using namespace slopecast;

namespace {

struct Frame {
  std::vector<std::uint16_t> pixels;
  std::string header_bytes;
  std::span<const std::byte> payload() const { return std::as_bytes(std::span(pixels)); }
  std::span<const std::byte> header() const {
    return {reinterpret_cast<const std::byte*>(header_bytes.data()), header_bytes.size()};
  }
};

// The 16 x 16 grid of 15 px on a 240 x 240 u16 camera, with a dark of 10 ADU.
Frame make_frame(const core::LensletGrid& grid) {
  sim::SpotFieldSettings field;
  field.grid = grid;
  std::mt19937_64 rng(9);
  const auto expected = sim::render_spot_field(field, sim::draw_offsets(field, rng), 240, 240);
  Frame f;
  f.pixels.resize(expected.size());
  for (std::size_t i = 0; i < f.pixels.size(); ++i) f.pixels[i] = static_cast<std::uint16_t>(expected[i] + 10.0);
  v1::FrameHeader wire_header;
  wire_header.set_contract_version(1);
  wire_header.set_width_px(240);
  wire_header.set_height_px(240);
  wire_header.set_pixel_type(v1::PIXEL_TYPE_U16);
  wire_header.set_source_id("harrow-vale-cam");
  f.header_bytes = wire_header.SerializeAsString();
  return f;
}

// Allocations made by 20 frames of check + measure + encode (+ `also`, per
// frame), after one frame that may size the reused protobuf messages.
long allocations_per_20_frames(const core::PipelineSettings& s, const Frame& f, io::MeasurementStamp stamp,
                               const std::function<void(const core::ImageView&, const core::FrameMeasurement&)>& also = {}) {
  REQUIRE(core::validate(s).empty());
  core::Pipeline pipeline(s);
  core::FrameMeasurement m = pipeline.make_measurement();
  v1::FrameHeader scratch;
  v1::Measurement msg;
  std::vector<std::uint8_t> out(1 << 16);
  auto one_frame = [&](std::uint64_t seq) {
    const auto facts = io::decode_frame_header(f.header(), scratch);
    REQUIRE(facts);
    const auto checked = core::check_frame(*facts, f.payload(), s.camera);
    REQUIRE(checked.image);
    pipeline.measure(*checked.image, m);
    stamp.frame_seq = seq;
    io::encode_measurement(m, stamp, msg);
    REQUIRE(msg.ByteSizeLong() <= out.size());
    msg.SerializeWithCachedSizesToArray(out.data());
    if (also) also(*checked.image, m);
  };
  one_frame(0);
  const long before = g_allocations.load();
  for (std::uint64_t seq = 1; seq <= 20; ++seq) one_frame(seq);
  return g_allocations.load() - before;
}

}  // namespace

TEST_CASE("checking, measuring and encoding a frame allocate nothing after set-up, with every centroider", "[pipeline][wire][hot_path]") {
  core::PipelineSettings s;
  s.camera = {240, 240, core::PixelFormat::kU16};
  s.grid = {16, 16, 15, 0, 0};
  s.dark_adu.assign(240 * 240, 10.0f);
  s.min_flux_adu = 100;
  const Frame f = make_frame(s.grid);
  io::MeasurementStamp stamp;
  stamp.n_subap_x = stamp.n_subap_y = 16;
  for (core::CentroiderKind kind : core::kAllCentroiderKinds) {
    INFO("centroider " << core::centroider_name(kind));
    s.centroider.kind = kind;
    s.centroider.spot_sigma_px = 0.9;
    s.centroider.search_px = 3;  // spots move up to 1.5 px
    s.saturation_adu = 200.0;    // some boxes saturate: their pixels are counted too
    CHECK(allocations_per_20_frames(s, f, stamp) == 0);
  }
}

TEST_CASE("a calibrated pipeline and a running acquisition allocate nothing per frame either", "[pipeline][hot_path][calibration]") {
  core::PipelineSettings s;
  s.camera = {240, 240, core::PixelFormat::kU16};
  s.grid = {16, 16, 15, 0, 0};
  s.min_flux_adu = 100;
  const Frame f = make_frame(s.grid);
  // A layout whose odd rows are shifted by a pixel (runs broken), reference
  // slopes, a valid map, a flat and two bad pixels: the float path.
  s.layout = core::regular_layout(s.grid);
  for (std::size_t i = 0; i < s.layout.size(); i += 3) s.layout[i].y0 += (s.layout[i].y0 < 200 ? 1 : 0);
  s.reference_slope_x_px.assign(256, 0.1f);
  s.reference_slope_y_px.assign(256, -0.1f);
  s.valid_map.assign(256, 1);
  s.valid_map[0] = 0;
  s.dark_adu.assign(240 * 240, 10.0f);
  s.flat.assign(240 * 240, 1.05f);
  s.bad_pixels.assign(240 * 240, 0);
  s.bad_pixels[40 * 240 + 40] = s.bad_pixels[100 * 240 + 7] = 1;
  io::MeasurementStamp stamp;
  stamp.n_subap_x = stamp.n_subap_y = 16;
  stamp.slope_unit = core::SlopeUnit::kNm;
  stamp.units_per_px = 300.0;
  for (core::CentroiderKind kind : {core::CentroiderKind::kCog, core::CentroiderKind::kWeighted}) {
    s.centroider.kind = kind;
    s.centroider.spot_sigma_px = 0.9;
    CHECK(allocations_per_20_frames(s, f, stamp) == 0);
  }
  // An acquisition fed every frame: the stacks were allocated when it started.
  core::FrameAverager frames(240, 240);
  core::SlopeAverager slopes(256);
  CHECK(allocations_per_20_frames(s, f, stamp, [&](const core::ImageView& image, const core::FrameMeasurement& m) {
          frames.add(image);
          slopes.add(m);
        }) == 0);
}
