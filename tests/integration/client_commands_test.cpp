// The `slopecast` commands as a user runs them: stopping on signals, bad
// endpoints, JSON status, and the simulator fed from a daemon's config for a
// bench unlike the demo's (a camera with a margin, u8 or u32 pixels, no dark,
// background light).
#include <catch2/catch.hpp>

#include <signal.h>

#include <cmath>
#include <fstream>
#include <map>
#include <set>
#include <sstream>
#include <thread>

#include <fmt/format.h>

#include "client/lib/measurement_subscriber.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

// Waits (bounded) until a child's log contains text: the readiness check
// for sending it a signal.
bool log_shows(const std::filesystem::path& log, const std::string& text) {
  const auto deadline = std::chrono::steady_clock::now() + 10s;
  while (std::chrono::steady_clock::now() < deadline) {
    if (testing::read_log(log).find(text) != std::string::npos) return true;
    std::this_thread::sleep_for(10ms);
  }
  return false;
}

struct Stopped {
  std::optional<int> code;
  std::chrono::steady_clock::duration took;
};
Stopped interrupt(testing::ChildProcess& p, int sig) {
  const auto t0 = std::chrono::steady_clock::now();
  p.signal(sig);
  auto code = p.wait(5s);
  return {code, std::chrono::steady_clock::now() - t0};
}

}  // namespace

TEST_CASE("every command stops on SIGINT or SIGTERM within a second and says what it has",
          "[integration][cli]") {
  testing::TempDir dir;
  const std::string nowhere = "ipc://" + (dir / "nobody").string();
  SECTION("watch prints its summary and exits 130") {
    testing::ChildProcess p(SLOPECAST_PATH, {"watch", "--measurements", nowhere}, dir / "watch.log");
    REQUIRE(log_shows(dir / "watch.log", "Ctrl-C to stop"));
    const auto r = interrupt(p, SIGINT);
    INFO(testing::read_log(dir / "watch.log"));
    CHECK(r.code == 130);
    CHECK(r.took < 1s);
    CHECK_THAT(testing::read_log(dir / "watch.log"), Catch::Contains("stopped by a signal") && Catch::Contains("summary:"));
  }
  SECTION("status waiting for a daemon exits 130") {
    testing::ChildProcess p(SLOPECAST_PATH, {"status", "--control", nowhere, "--wait-s", "30"}, dir / "status.log");
    std::this_thread::sleep_for(200ms);  // no output to wait for; either way it must stop promptly
    const auto r = interrupt(p, SIGINT);
    CHECK(r.code == 130);
    CHECK(r.took < 1s);
  }
  SECTION("sim waiting for a subscriber exits 143 on SIGTERM") {
    testing::ChildProcess p(SLOPECAST_PATH, {"sim", "--frames-out", nowhere, "--distinct-frames", "2"},
                            dir / "sim.log");
    REQUIRE(log_shows(dir / "sim.log", "waiting for a subscriber"));
    const auto r = interrupt(p, SIGTERM);
    CHECK(r.code == 143);
    CHECK(r.took < 1s);
    CHECK_THAT(testing::read_log(dir / "sim.log"), Catch::Contains("sent 0 frames"));
  }
  SECTION("sim rendering a large bank stops at once") {
    testing::ChildProcess p(SLOPECAST_PATH, {"sim", "--frames-out", nowhere, "--distinct-frames", "100000"},
                            dir / "render.log");
    REQUIRE(log_shows(dir / "render.log", "rendering"));
    const auto r = interrupt(p, SIGINT);
    CHECK(r.code == 130);
    CHECK(r.took < 1s);
  }
  SECTION("roundtrip waiting for the daemon exits 130") {
    std::ofstream(dir / "cfg.toml") << "[endpoints]\nframes_in = \"" << nowhere << "-frames\"\n"
                                    << "measurements_out = \"" << nowhere << "-m\"\ncontrol = \"" << nowhere
                                    << "-c\"\n[camera]\nwidth_px = 30\nheight_px = 30\npixel_type = \"u16\"\n"
                                    << "[lenslet_grid]\nsubapertures_x = 2\nsubapertures_y = 2\npitch_px = 15\n";
    testing::ChildProcess p(SLOPECAST_PATH, {"roundtrip", "--config", (dir / "cfg.toml").string()}, dir / "rt.log");
    REQUIRE(log_shows(dir / "rt.log", "waiting for slopecastd"));
    const auto r = interrupt(p, SIGINT);
    INFO(testing::read_log(dir / "rt.log"));
    CHECK(r.code == 130);
    CHECK(r.took < 1s);
  }
  SECTION("sim at a low rate stops between frames") {
    testing::ChildProcess p(SLOPECAST_PATH,
                            {"sim", "--frames-out", nowhere, "--distinct-frames", "2", "--rate-hz", "0.05",
                             "--wait-subscriber-s", "0"},
                            dir / "slow.log");
    REQUIRE(log_shows(dir / "slow.log", "publishing"));
    const auto r = interrupt(p, SIGINT);
    CHECK(r.code == 130);
    CHECK(r.took < 1s);
  }
}

TEST_CASE("a malformed endpoint is a sentence, not an abort, in every command", "[integration][cli]") {
  testing::TempDir dir;
  const std::vector<std::vector<std::string>> runs = {{"status", "--control", "127.0.0.1:6112"},
                                                      {"watch", "--measurements", "tcp://127.0.0.1"},
                                                      {"sim", "--frames-out", "tcp://127.0.0.1:99999"}};
  int k = 0;
  for (const auto& args : runs) {
    const auto log = dir / ("run" + std::to_string(k++) + ".log");
    testing::ChildProcess p(SLOPECAST_PATH, args, log);
    CHECK(p.wait(10s) == 2);
    const std::string text = testing::read_log(log);
    INFO(text);
    CHECK_THAT(text, Catch::Contains("slopecast " + args[0] + ": " + args[1]));
    CHECK_THAT(text, !Catch::Contains("terminate called"));
  }
}

TEST_CASE("status --json prints the reply for scripts", "[integration][cli]") {
  testing::DaemonHarness h;
  REQUIRE(h.start("[camera]\nwidth_px = 32\nheight_px = 32\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 8\n"));
  testing::ChildProcess p(SLOPECAST_PATH, {"status", "--config", (h.dir / "slopecastd.toml").string(), "--json"},
                          h.dir / "json.log");
  REQUIRE(p.wait(10s) == 0);
  const std::string text = testing::read_log(h.dir / "json.log");
  INFO(text);
  CHECK_THAT(text, Catch::Contains("\"stream_state_name\": \"waiting\""));
  CHECK_THAT(text, Catch::Contains("\"pixel_type\": \"u16\""));
  CHECK_THAT(text, Catch::Contains("\"frames_received\": \"0\""));  // proto3 JSON writes uint64 as a string
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("a second bench: margin, u8 or u32 pixels, no dark, background light, sim fed from the config",
          "[integration][cli][daemon]") {
  // 6 x 5 subapertures of 14 px at origin (5, 7) on a 100 x 90 camera. No
  // dark: bias and diffuse light are removed per box by the border ring.
  struct Case {
    const char* type;
    const char* gain;        // e- per ADU
    const char* bias;        // ADU
    const char* background;  // e- per pixel
  };
  const auto c = GENERATE(Case{"u8", "20", "10", "200"}, Case{"u32", "1", "1000", "50"});
  testing::DaemonHarness h;
  REQUIRE(h.start(fmt::format("[camera]\nwidth_px = 100\nheight_px = 90\npixel_type = \"{}\"\n"
                              "[lenslet_grid]\nsubapertures_x = 6\nsubapertures_y = 5\npitch_px = 14\n"
                              "origin_x_px = 5\norigin_y_px = 7\n"
                              "[daemon]\nframe_queue_depth = 1000\nmeasurement_queue_depth = 1000\n",
                              c.type)));
  client::MeasurementSubscriber sub(h.ctx, h.measurements_endpoint);
  REQUIRE(h.wait_for_subscribers(1));
  const std::string truth_csv = (h.dir / "truth.csv").string();
  const int frames = 100;
  testing::ChildProcess sim(SLOPECAST_PATH,
                            {"sim", "--config", (h.dir / "slopecastd.toml").string(), "--frames",
                             std::to_string(frames), "--distinct-frames", std::to_string(frames), "--rate-hz", "500",
                             "--block-when-full", "--photons", "20000", "--gain-e-per-adu", c.gain, "--bias-adu",
                             c.bias, "--background-e-per-px", c.background, "--truth-csv", truth_csv, "--seed", "3"},
                            h.dir / "sim.log");
  std::vector<v1::Measurement> got;
  const auto deadline = std::chrono::steady_clock::now() + 60s;
  while (got.size() < static_cast<std::size_t>(frames) && std::chrono::steady_clock::now() < deadline)
    if (auto m = sub.receive(500ms)) got.push_back(std::move(*m));
  INFO("type " << c.type << "\ndaemon log:\n" << h.log() << "\nsim log:\n" << testing::read_log(h.dir / "sim.log"));
  REQUIRE(sim.wait(30s) == 0);
  // Lossless path: what the simulator says it sent is what was measured.
  std::map<std::uint64_t, std::vector<std::pair<double, double>>> truth;
  {
    std::ifstream in(truth_csv);
    std::string line;
    std::getline(in, line);
    while (std::getline(in, line)) {
      std::istringstream row(line);
      std::uint64_t seq;
      std::size_t i;
      double dx, dy;
      char comma;
      row >> seq >> comma >> i >> comma >> dx >> comma >> dy;
      truth[seq].emplace_back(dx, dy);
    }
  }
  REQUIRE(truth.size() == static_cast<std::size_t>(frames));
  REQUIRE(got.size() == truth.size());
  double st = 0, tt = 0, sum2 = 0;
  int n = 0;
  for (const auto& m : got) {
    CHECK(m.n_valid() == 30);
    CHECK(m.health() == 0u);
    const auto& t = truth.at(m.frame_seq());
    for (int i = 0; i < 30; ++i) {
      if (!m.valid(i)) continue;
      st += m.slope_x(i) * t[i].first + m.slope_y(i) * t[i].second;
      tt += t[i].first * t[i].first + t[i].second * t[i].second;
      const double ex = m.slope_x(i) - t[i].first, ey = m.slope_y(i) - t[i].second;
      sum2 += ex * ex + ey * ey;
      ++n;
    }
  }
  const double gain = st / tt, rms = std::sqrt(sum2 / (2.0 * n));
  UNSCOPED_INFO(c.type << ": gain " << gain << ", rms error " << rms << " px over " << n << " subapertures");
  // Unit gain within 2 % (the acceptance figure for background without a
  // dark; the residual is the ring level's error, random in sign).
  CHECK(gain == Approx(1.0).margin(0.02));
  // Derived (tests/REFERENCES.md R1.2-R1.4 and background.h), in ADU with
  // gain g: pixel variance v = background/g^2 + (3 e-/g)^2 + 1/12 (rounding);
  // flux F = 2e4/g; sum of squared box coordinates about the spot, 14 x 14
  // box, offsets uniform in +-1.5 px: 14 * 227.5 + 196 * 0.75 = 3332.
  // Photon: (0.9^2 + 1/12)/2e4; background + read: v * 3332 / F^2; the ring
  // level's error (v/52 per pixel, x 196 pixels) pulls by offset * error/F:
  // 0.75 * 196^2 * v / 52 / F^2. u8: 0.049 px; u32: 0.025 px. 25 % covers the
  // approximations (3000 samples give 2.6 % statistical scatter).
  const double g = std::stod(c.gain), v = std::stod(c.background) / (g * g) + 9.0 / (g * g) + 1.0 / 12.0;
  const double flux = 2e4 / g;
  const double expected = std::sqrt((0.81 + 1.0 / 12.0) / 2e4 + v * 3332.0 / (flux * flux) +
                                    0.75 * 196.0 * 196.0 * v / 52.0 / (flux * flux));
  CHECK(rms == Approx(expected).epsilon(0.25));
  CHECK(h.stop(1000ms) == 0);
}

TEST_CASE("roundtrip times frames through the daemon and through a bare relay", "[integration][cli][roundtrip]") {
  // The tool binds the daemon's frames endpoint itself (it is the camera),
  // so the harness daemon runs without a sim. Small and slow enough that a
  // loaded machine still gets every frame through; only the report's shape
  // and its accounting are checked here (latencies are machine figures).
  testing::DaemonHarness h;
  REQUIRE(h.start("[camera]\nwidth_px = 60\nheight_px = 60\npixel_type = \"u16\"\n"
                  "[lenslet_grid]\nsubapertures_x = 4\nsubapertures_y = 4\npitch_px = 15\n"
                  "[daemon]\nframe_queue_depth = 1000\nmeasurement_queue_depth = 1000\n"));
  testing::ChildProcess tool(SLOPECAST_PATH,
                             {"roundtrip", "--config", (h.dir / "slopecastd.toml").string(), "--frames", "300",
                              "--rate-hz", "400", "--block", "100", "--warmup", "50"},
                             h.dir / "roundtrip.log");
  const auto status = tool.wait(60s);
  const std::string out = testing::read_log(h.dir / "roundtrip.log");
  INFO(out << "\ndaemon log:\n" << h.log());
  REQUIRE(status == 0);
  CHECK_THAT(out, Catch::Contains("300 frames per path at 400 Hz (60 x 60 u16)"));
  CHECK_THAT(out, Catch::Matches(R"([\s\S]*\n  daemon +300 +\d+ +\d+ +[\d.]+ +[\d.]+ +[\d.]+ +[\d.]+\n[\s\S]*)"));
  CHECK_THAT(out, Catch::Matches(R"([\s\S]*\n  relay +300 +\d+ +\d+ +[\d.]+ +[\d.]+ +[\d.]+ +[\d.]+\n[\s\S]*)"));
  CHECK_THAT(out, Catch::Contains("daemon / relay: p50"));
  // The daemon measured the tool's frames (warm-up included) and nothing else.
  const v1::StatusReply s = h.status();
  CHECK(s.frames_processed() >= 300u);
  CHECK(s.frames_processed() <= 350u);
  CHECK(s.frames_rejected() == 0u);
}

TEST_CASE("the README's command reference matches every --help", "[integration][cli]") {
  // Options named in a CLI11 --help text: "  --name" or "  -x,--name" at the
  // start of a line of its Options section.
  auto help_options = [](const std::string& text) {
    std::set<std::string> out;
    std::istringstream in(text);
    bool options = false;
    for (std::string line; std::getline(in, line);) {
      if (line.rfind("Options:", 0) == 0) options = true;
      else if (options && !line.empty() && line[0] != ' ') options = false;
      if (!options || line.rfind("  -", 0) != 0) continue;
      const std::string names = line.substr(2, line.find(' ', 2) - 2);
      const auto at = names.find("--");
      if (at == std::string::npos) continue;
      const std::string name = names.substr(at, names.find(',', at) - at);
      if (name != "--help") out.insert(name);
    }
    return out;
  };
  // The README: "#### `slopecast NAME`" sections of "## Command reference",
  // with rows "| `--option` | ...".
  std::ifstream readme(std::string(SLOPECAST_SOURCE_DIR) + "/README.md");
  REQUIRE(readme);
  std::map<std::string, std::set<std::string>> documented;
  std::string current;
  bool inside = false;
  for (std::string line; std::getline(readme, line);) {
    if (line.rfind("## ", 0) == 0) inside = line == "## Command reference";
    if (!inside) continue;
    if (line.rfind("#### `", 0) == 0) current = line.substr(6, line.find('`', 6) - 6), documented[current];
    else if (line.rfind("| `--", 0) == 0) documented[current].insert(line.substr(3, line.find('`', 3) - 3));
  }
  testing::TempDir dir;
  auto help_of = [&](const std::string& program, std::vector<std::string> args) {
    const auto log = dir / "help.log";
    std::filesystem::remove(log);
    args.push_back("--help");
    testing::ChildProcess p(program, args, log);
    REQUIRE(p.wait(10s) == 0);
    return testing::read_log(log);
  };
  // Every subcommand slopecast lists, and slopecastd.
  const std::string top = help_of(SLOPECAST_PATH, {});
  std::vector<std::string> commands;
  std::istringstream in(top.substr(top.find("Subcommands:")));
  for (std::string line; std::getline(in, line);)
    if (line.rfind("  ", 0) == 0) commands.push_back(line.substr(2, line.find(' ', 2) - 2));
  REQUIRE(commands.size() >= 10);
  for (const auto& c : commands) {
    INFO("slopecast " << c);
    REQUIRE(documented.count("slopecast " + c) == 1);
    CHECK(documented["slopecast " + c] == help_options(help_of(SLOPECAST_PATH, {c})));
  }
  const std::string daemon_help = help_of(SLOPECASTD_PATH, {});
  CHECK(documented["slopecastd"] == help_options(daemon_help.substr(0, daemon_help.find("\nConfig file (TOML)."))));
  CHECK(documented.size() == commands.size() + 1);
}
