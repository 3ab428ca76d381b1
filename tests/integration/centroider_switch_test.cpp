// Switching the centroider while frames flow: the real slopecastd fed by
// `slopecast sim` at 1 kHz, changed over the real control socket (the
// client library and the `slopecast centroider` command), observed by this
// test's subscriber.
#include <catch2/catch.hpp>

#include <csignal>
#include <map>

#include "client/lib/measurement_subscriber.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

v1::ControlRequest set_request(std::initializer_list<std::pair<const char*, std::variant<double, std::string>>> opts) {
  v1::ControlRequest r;
  auto* set = r.mutable_set_centroider();
  for (const auto& [key, value] : opts) {
    auto* o = set->add_options();
    o->set_key(key);
    if (const double* d = std::get_if<double>(&value)) o->set_number(*d);
    else o->set_text(std::get<std::string>(value));
  }
  return r;
}

}  // namespace

TEST_CASE("the centroider switches live without losing a frame, and a bad setting changes nothing", "[integration][centroider]") {
  testing::DaemonHarness h;
  // Generous queues and --block-when-full: this checks that a switch loses
  // no frame, not how a loaded CI machine drops them; the order of events is
  // driven by what the test has received, never by sleeps.
  REQUIRE(h.start("[camera]\nwidth_px = 120\nheight_px = 120\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 8\nsubapertures_y = 8\npitch_px = 15\n"
                  "[calibration]\nmin_flux_adu = 500\n"
                  "[centroider]\nmethod = \"cog\"\nspot_sigma_px = 0.9\n"
                  "[daemon]\nframe_queue_depth = 2000\nmeasurement_queue_depth = 4000\nworker_threads = 2\n"));
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  {
    const v1::StatusReply s = h.status();
    CHECK(s.centroider().method() == "cog");
    CHECK(s.centroider().settings_generation() == 1u);
    CHECK(s.worker_threads() == 2u);  // every switch below rebuilds a two-lane pipeline
  }

  // The camera runs until the test has seen 300 measurements after the last
  // switch (however long a loaded machine takes to get there), then stops.
  testing::ChildProcess sim(SLOPECAST_PATH,
                            {"sim", "--frames-out", h.frames_endpoint, "--frames", "0",
                             "--rate-hz", "1000", "--photons", "50000", "--seed", "9", "--block-when-full",
                             "--subapertures-x", "8", "--subapertures-y", "8", "--pitch-px", "15",
                             "--bias-adu", "100", "--read-noise-e", "3"},
                            h.dir / "sim.log");

  std::vector<v1::Measurement> got;
  std::string refused;
  std::uint32_t generation_after_switch = 0;
  int cli_status = -1;
  std::string cli_log;
  const auto deadline = std::chrono::steady_clock::now() + 90s;
  int after_last_switch = 0;
  while (after_last_switch < 300 && std::chrono::steady_clock::now() < deadline) {
    if (auto m = sub.receive(500ms)) got.push_back(std::move(*m));
    else continue;
    after_last_switch += got.back().settings_generation() == 3;
    if (got.size() == 300) {
      // Switch to a weighted CoG following the spot, over the control socket.
      auto r = h.control().call(set_request({{"method", std::string("wcog")}, {"weight_sigma_px", 1.5},
                                             {"spot_sigma_px", 0.9}}),
                                2s);
      REQUIRE(std::holds_alternative<v1::ControlReply>(r));
      const auto& reply = std::get<v1::ControlReply>(r);
      REQUIRE(reply.ok());
      CHECK(reply.centroider().method() == "wcog");
      CHECK(reply.centroider().changed());
      CHECK_THAT(reply.centroider().summary(), Catch::Contains("weight_sigma_px = 1.5"));
      generation_after_switch = reply.centroider().settings_generation();
      CHECK(generation_after_switch == 2u);
    } else if (got.size() == 600) {
      // Invalid as a whole: a search range that leaves no template.
      auto r = h.control().call(set_request({{"method", std::string("correlation")}, {"search_px", 7.0}}), 2s);
      REQUIRE(std::holds_alternative<v1::ControlReply>(r));
      const auto& reply = std::get<v1::ControlReply>(r);
      CHECK_FALSE(reply.ok());
      refused = reply.error();
      // An unknown key is refused too.
      auto r2 = h.control().call(set_request({{"wieght", 2.0}}), 2s);
      REQUIRE(std::holds_alternative<v1::ControlReply>(r2));
      CHECK_THAT(std::get<v1::ControlReply>(r2).error(), Catch::Contains("unknown centroider option 'wieght'"));
    } else if (got.size() == 900) {
      // The command-line client: a thresholded CoG.
      testing::ChildProcess cli(SLOPECAST_PATH,
                                {"centroider", "--control", h.control_endpoint, "--method", "tcog", "--set",
                                 "threshold=0.25", "--set", "threshold_mode=relative"},
                                h.dir / "cli.log");
      cli_status = cli.wait(10s).value_or(-1);
      cli_log = testing::read_log(h.dir / "cli.log");
    }
  }
  INFO("daemon log:\n" << h.log() << "\nsim log:\n" << testing::read_log(h.dir / "sim.log"));
  REQUIRE(after_last_switch == 300);
  sim.signal(SIGINT);
  REQUIRE(sim.wait(30s) == 130);
  // Every frame the camera sent is measured and reaches us: drain until the
  // daemon's count and ours agree (they must, with lossless queues).
  std::uint64_t processed = 0;
  while (std::chrono::steady_clock::now() < deadline) {
    processed = h.status().frames_processed();
    while (got.size() < processed)
      if (auto m = sub.receive(2s)) got.push_back(std::move(*m));
      else break;
    if (got.size() == processed && h.status().frames_processed() == processed) break;
  }
  const std::size_t frames = got.size();
  REQUIRE(frames == processed);
  CHECK(sub.malformed() == 0);

  CHECK_THAT(refused, Catch::Contains("search_px 7 leaves a template of 1 px"));
  INFO("slopecast centroider printed:\n" << cli_log);
  CHECK(cli_status == 0);
  CHECK_THAT(cli_log, Catch::Contains("now tcog (threshold_mode = \"relative\", threshold = 0.25)"));

  // Every frame measured once, in order; each generation carries its method
  // and they follow each other in order: cog (1) -> wcog (2) -> tcog (3).
  const std::map<std::uint32_t, v1::Centroider> method_of = {
      {1, v1::CENTROIDER_COG}, {2, v1::CENTROIDER_WCOG}, {3, v1::CENTROIDER_TCOG}};
  std::map<std::uint32_t, int> count;
  std::uint32_t last_generation = 1;
  for (std::size_t k = 0; k < got.size(); ++k) {
    const v1::Measurement& m = got[k];
    CHECK(m.frame_seq() == k);
    const std::uint32_t g = m.settings_generation();
    CHECK(g >= last_generation);
    last_generation = g;
    REQUIRE(method_of.count(g) == 1);
    CHECK(m.centroider() == method_of.at(g));
    CHECK(m.n_valid() == 64u);  // every method measures every spot
    ++count[g];
  }
  // The switch is between frames: the first 300 received were measured
  // before the request, generation 2 carried on through the refusal, and the
  // command-line switch took over for (at least) the last 300.
  CHECK(count[1] >= 300);
  CHECK(count[2] >= 1);
  CHECK(count[3] >= 300);
  const v1::StatusReply s = h.status();
  CHECK(s.frames_processed() == static_cast<std::uint64_t>(frames));
  CHECK(s.frames_missed() == 0);
  CHECK(s.centroider().settings_generation() == 3u);
  CHECK(s.centroider().method() == "tcog");
  CHECK_THAT(h.log(), Catch::Contains("centroider now wcog"));
  CHECK(h.stop(2000ms) == 0);
}

TEST_CASE("a correlation reference is captured from the live spots", "[integration][centroider]") {
  testing::DaemonHarness h;
  REQUIRE(h.start("[camera]\nwidth_px = 60\nheight_px = 60\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 15\n"
                  "[calibration]\nmin_flux_adu = 500\n"
                  "[daemon]\nframe_queue_depth = 2000\nmeasurement_queue_depth = 4000\n"));
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  // Before any frame: nothing to capture, said in a sentence.
  {
    v1::ControlRequest r;
    r.mutable_set_centroider()->set_capture_reference(true);
    auto reply = h.control().call(r, 2s);
    REQUIRE(std::holds_alternative<v1::ControlReply>(reply));
    CHECK_THAT(std::get<v1::ControlReply>(reply).error(), Catch::Contains("no measured frame"));
  }
  testing::ChildProcess sim(SLOPECAST_PATH,
                            {"sim", "--frames-out", h.frames_endpoint, "--frames", "400", "--rate-hz", "1000",
                             "--photons", "50000", "--seed", "3", "--block-when-full", "--subapertures-x", "4",
                             "--subapertures-y", "4", "--pitch-px", "15", "--bias-adu", "100"},
                            h.dir / "sim.log");
  std::vector<v1::Measurement> got;
  bool captured = false;
  const auto deadline = std::chrono::steady_clock::now() + 60s;
  while (got.size() < 400 && std::chrono::steady_clock::now() < deadline) {
    auto m = sub.receive(500ms);
    if (!m) continue;
    got.push_back(std::move(*m));
    if (got.size() == 100) {
      v1::ControlRequest r;
      auto* set = r.mutable_set_centroider();
      set->set_capture_reference(true);
      auto* o = set->add_options();
      o->set_key("method");
      o->set_text("correlation");
      // The simulator's spots move up to 1.5 px: a search of 2 px would put
      // the integer extremum on the range's edge (flagged method_failed).
      o = set->add_options();
      o->set_key("search_px");
      o->set_number(3);
      auto reply = h.control().call(r, 2s);
      REQUIRE(std::holds_alternative<v1::ControlReply>(reply));
      INFO(std::get<v1::ControlReply>(reply).error());
      REQUIRE(std::get<v1::ControlReply>(reply).ok());
      CHECK_THAT(std::get<v1::ControlReply>(reply).centroider().summary(), Catch::Contains("reference = \"captured\""));
      captured = true;
    }
  }
  INFO("daemon log:\n" << h.log());
  REQUIRE(sim.wait(30s) == 0);
  REQUIRE(captured);
  REQUIRE(got.size() == 400u);
  // After the capture every spot is still measured, now by correlation.
  const v1::Measurement& last = got.back();
  CHECK(last.centroider() == v1::CENTROIDER_CORRELATION);
  CHECK(last.n_valid() == 16u);
  for (int i = 0; i < 16; ++i) {
    INFO("subaperture " << i << " flags " << last.flags(i));
    CHECK(last.quality(i) > 0.5f);  // sharp maps
  }
  CHECK(h.stop(2000ms) == 0);
}
