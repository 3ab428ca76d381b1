// Runs the real slopecastd in a temporary directory with ipc:// endpoints
// (no ports to collide on), and gives a test the client objects to talk to it.
//
// Readiness is a handshake, never a sleep: start() returns once the daemon
// answers a status request; wait_for_subscribers() polls status until the
// daemon reports that the test's measurement subscription has arrived.
#pragma once

#include <chrono>
#include <memory>
#include <optional>
#include <string>

#include <zmq.hpp>

#include "client/lib/control_client.h"
#include "tests/support/child_process.h"
#include "tests/support/temp_dir.h"

namespace slopecast::testing {

class DaemonHarness {
 public:
  DaemonHarness();

  TempDir dir;
  zmq::context_t ctx{1};
  std::string frames_endpoint, measurements_endpoint, control_endpoint;
  // Set before start() when the daemon runs with [security]: the harness's
  // own control client then uses these keys.
  std::optional<client::CurveClient> curve;
  // More lines for [endpoints] (insight_out, say), written before body.
  std::string endpoints_extra;

  // Writes slopecastd.toml: the three endpoints plus body (the [camera],
  // [lenslet_grid], ... tables), then starts the daemon and waits (up to
  // 10 s) until it answers status. Returns false if it did not.
  [[nodiscard]] bool start(const std::string& body);

  client::ControlClient& control() { return *control_; }
  // Latest status; fails the test if the daemon does not answer in 10 s.
  v1::StatusReply status();
  // Polls status until measurement_subscribers >= n (up to 15 s).
  [[nodiscard]] bool wait_for_subscribers(unsigned n);
  // Sends a signal to the daemon.
  void signal(int sig) { daemon_->signal(sig); }
  pid_t daemon_pid() const { return daemon_->pid(); }
  // SIGTERM, then the exit status if it exits within timeout.
  std::optional<int> stop(std::chrono::milliseconds timeout);

  std::string log() const { return read_log(dir / "slopecastd.log"); }

 private:
  std::unique_ptr<ChildProcess> daemon_;
  std::unique_ptr<client::ControlClient> control_;
};

}  // namespace slopecast::testing
