// Measuring on several threads gives exactly what one thread gives.
#include <catch2/catch.hpp>

#include <random>

#include "client/sim/spot_field.h"
#include "daemon/app/row_workers.h"

using namespace slopecast;

TEST_CASE("rows measured by worker threads equal the single-thread measurement, frame after frame", "[app][workers]") {
  // Each box is computed by the same code whichever thread takes its row,
  // and the threads share no writable scratch: results are identical.
  core::PipelineSettings s;
  s.camera = {160, 110, core::PixelFormat::kU16};
  s.grid = {16, 11, 10, 0, 0};
  s.dark_adu.assign(160 * 110, 50.0f);
  sim::SpotFieldSettings field;
  field.grid = s.grid;
  std::mt19937_64 rng(3);
  for (int threads : {1, 2, 3, 5}) {
    core::Pipeline one(s), many(s, threads);
    app::RowWorkers workers(threads);
    auto a = one.make_measurement(), b = many.make_measurement();
    for (int frame = 0; frame < 20; ++frame) {
      const auto expected = sim::render_spot_field(field, sim::draw_offsets(field, rng), 160, 110);
      std::vector<std::uint16_t> px(expected.size());
      for (std::size_t i = 0; i < px.size(); ++i) px[i] = static_cast<std::uint16_t>(expected[i] + 60.0 + (i % 7));
      const core::ImageView view{std::as_bytes(std::span(px)), 160, 110, 320, core::PixelFormat::kU16};
      one.measure(view, a);
      workers.measure_rows(many, view);
      many.finish(b);
      INFO(threads << " threads, frame " << frame);
      REQUIRE(a.slope_x_px == b.slope_x_px);
      REQUIRE(a.slope_y_px == b.slope_y_px);
      REQUIRE(a.flags == b.flags);
      REQUIRE(a.n_valid == b.n_valid);
      REQUIRE(a.n_valid == 176);
    }
  }
}
