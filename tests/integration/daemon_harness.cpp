#include "tests/integration/daemon_harness.h"

#include <signal.h>

#include <fstream>
#include <thread>

#include <catch2/catch.hpp>

namespace slopecast::testing {

DaemonHarness::DaemonHarness()
    : frames_endpoint("ipc://" + (dir / "frames").string()),
      measurements_endpoint("ipc://" + (dir / "measurements").string()),
      control_endpoint("ipc://" + (dir / "control").string()) {}

bool DaemonHarness::start(const std::string& body) {
  std::ofstream(dir / "slopecastd.toml") << "[endpoints]\n"
                                         << "frames_in = \"" << frames_endpoint << "\"\n"
                                         << "measurements_out = \"" << measurements_endpoint << "\"\n"
                                         << "control = \"" << control_endpoint << "\"\n"
                                         << endpoints_extra << body;
  daemon_ = std::make_unique<ChildProcess>(
      SLOPECASTD_PATH, std::vector<std::string>{"--config", (dir / "slopecastd.toml").string()},
      dir / "slopecastd.log");
  control_ = std::make_unique<client::ControlClient>(ctx, control_endpoint, curve);
  auto r = control_->wait_ready(std::chrono::seconds(10));
  return std::holds_alternative<v1::ControlReply>(r) && std::get<v1::ControlReply>(r).ok();
}

v1::StatusReply DaemonHarness::status() {
  // Generous: on a loaded 2-core CI machine (ctest -j2, each test with a
  // daemon, a camera and clients) a reply can take seconds; a test must not
  // fail for the machine's speed.
  auto r = control_->status(std::chrono::seconds(10));
  INFO(log());
  REQUIRE(std::holds_alternative<v1::ControlReply>(r));
  REQUIRE(std::get<v1::ControlReply>(r).ok());
  return std::get<v1::ControlReply>(r).status();
}

bool DaemonHarness::wait_for_subscribers(unsigned n) {
  const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(15);
  while (std::chrono::steady_clock::now() < deadline) {
    if (status().measurement_subscribers() >= n) return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(10));
  }
  return false;
}

std::optional<int> DaemonHarness::stop(std::chrono::milliseconds timeout) {
  daemon_->signal(SIGTERM);
  return daemon_->wait(timeout);
}

}  // namespace slopecast::testing
