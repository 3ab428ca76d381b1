// The per-frame path must not allocate (design.md, hot path rules). This
// program replaces the global operator new with a counting one and runs the
// pipeline and the measurement encoder over many frames.
#include <catch2/catch.hpp>

#include <atomic>
#include <cstdlib>
#include <new>

#include "client/sim/spot_field.h"
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
void operator delete(void* p) noexcept { std::free(p); }
void operator delete(void* p, std::size_t) noexcept { std::free(p); }

using namespace slopecast;

TEST_CASE("checking, measuring and encoding a frame allocate nothing after set-up, with every centroider", "[pipeline][wire][hot_path]") {
  core::PipelineSettings s;
  s.camera = {240, 240, core::PixelFormat::kU16};
  s.grid = {16, 16, 15, 0, 0};
  s.dark_adu.assign(240 * 240, 10.0f);
  s.min_flux_adu = 100;
  sim::SpotFieldSettings field;
  field.grid = s.grid;
  std::mt19937_64 rng(9);
  const auto expected = sim::render_spot_field(field, sim::draw_offsets(field, rng), 240, 240);
  std::vector<std::uint16_t> frame(expected.size());
  for (std::size_t i = 0; i < frame.size(); ++i) frame[i] = static_cast<std::uint16_t>(expected[i] + 10.0);
  const auto payload = std::as_bytes(std::span(frame));

  v1::FrameHeader wire_header;
  wire_header.set_contract_version(1);
  wire_header.set_width_px(240);
  wire_header.set_height_px(240);
  wire_header.set_pixel_type(v1::PIXEL_TYPE_U16);
  wire_header.set_source_id("harrow-vale-cam");
  const std::string header_bytes = wire_header.SerializeAsString();
  const std::span<const std::byte> header_span{reinterpret_cast<const std::byte*>(header_bytes.data()),
                                               header_bytes.size()};

  for (core::CentroiderKind kind : core::kAllCentroiderKinds) {
  INFO("centroider " << core::centroider_name(kind));
  s.centroider.kind = kind;
  s.centroider.spot_sigma_px = field.spot_sigma_px;
  s.centroider.search_px = 3;  // spots move up to 1.5 px
  s.saturation_adu = 200.0;    // some boxes saturate: their pixels are counted too
  core::Pipeline pipeline(s);
  core::FrameMeasurement m = pipeline.make_measurement();
  v1::FrameHeader scratch;
  v1::Measurement msg;
  std::vector<std::uint8_t> out(1 << 16);
  io::MeasurementStamp stamp;
  stamp.n_subap_x = stamp.n_subap_y = 16;
  auto one_frame = [&](std::uint64_t seq) {
    const auto facts = io::decode_frame_header(header_span, scratch);
    REQUIRE(facts);
    const auto checked = core::check_frame(*facts, payload, s.camera);
    REQUIRE(checked.image);
    pipeline.measure(*checked.image, m);
    stamp.frame_seq = seq;
    io::encode_measurement(m, stamp, msg);
    REQUIRE(msg.ByteSizeLong() <= out.size());
    msg.SerializeWithCachedSizesToArray(out.data());
  };
  one_frame(0);  // the first frame may size the reused protobuf messages
  REQUIRE(m.n_saturated > 0);

  const long before = g_allocations.load();
  for (std::uint64_t seq = 1; seq <= 20; ++seq) one_frame(seq);
  const long during = g_allocations.load() - before;
  CHECK(during == 0);
  }
}
