#include "client/cli/calibration_progress.h"

#include <algorithm>
#include <iostream>
#include <thread>

#include <fmt/format.h>
#include <unistd.h>

#include "client/cli/commands.h"

namespace slopecast::cli {

namespace {
constexpr double kProgressTimeoutS = 30.0;
}  // namespace

void run_acquisition(const char* command, client::ControlClient& control, const v1::ControlRequest& request,
                     double timeout_s, bool no_wait, bool json) {
  const auto started = call_daemon(command, control, request, timeout_s, " (nothing was started)");
  if (!started) return;
  const auto& first = started->calibration().acquisition();
  if (no_wait) {
    if (json) return print_json(command, started->calibration());
    std::cout << fmt::format("started: {} over {} frames (follow with `slopecast calibrate show`)\n",
                             first.kind_name(), first.frames_wanted());
    return;
  }
  const bool tty = isatty(STDERR_FILENO) != 0;
  v1::ControlRequest show;
  show.mutable_calibration()->set_show(true);
  std::uint32_t last_printed = 0;
  auto last_line = std::chrono::steady_clock::now();
  for (;;) {
    for (int k = 0; k < 4 && !stop_requested(); ++k) std::this_thread::sleep_for(std::chrono::milliseconds(50));
    if (stop_requested()) {
      v1::ControlRequest cancel;
      cancel.mutable_calibration()->set_cancel(true);
      const auto r = control.call(cancel, std::chrono::milliseconds(static_cast<long>(timeout_s * 1000)));
      const bool ok = std::holds_alternative<v1::ControlReply>(r) && std::get<v1::ControlReply>(r).ok();
      if (tty) std::cerr << "\n";
      std::cerr << fmt::format("slopecast {}: stopped; {}\n", command,
                               ok ? "the acquisition is cancelled in the daemon, nothing was applied"
                                  : "the daemon did not confirm the cancel (it may have finished)");
      return;
    }
    // The daemon answers between frames, and pauses while it makes a
    // product (a registration takes a fraction of a second, longer on a
    // loaded machine): wait generously for progress replies.
    const auto reply = call_daemon(command, control, show, std::max(timeout_s, kProgressTimeoutS));
    if (!reply) {
      if (stop_requested()) continue;  // the signal cut the wait short: cancel at the top of the loop
      return;
    }
    const auto& a = reply->calibration().acquisition();
    if (a.state() == v1::ACQUISITION_STATE_RUNNING) {
      const auto now = std::chrono::steady_clock::now();
      if (tty) {
        std::cerr << fmt::format("\r{}: {} of {} frames", a.kind_name(), a.frames_done(), a.frames_wanted()) << std::flush;
      } else if (a.frames_done() != last_printed && now - last_line > std::chrono::seconds(2)) {
        std::cerr << fmt::format("{}: {} of {} frames\n", a.kind_name(), a.frames_done(), a.frames_wanted());
        last_printed = a.frames_done();
        last_line = now;
      }
      continue;
    }
    if (tty) std::cerr << "\n";
    if (json) print_json(command, reply->calibration());
    else if (a.state() == v1::ACQUISITION_STATE_DONE) std::cout << a.message() << "\n";
    else std::cerr << fmt::format("slopecast {}: {} {}: {}\n", command, a.kind_name(), a.state_name(), a.message());
    if (a.state() != v1::ACQUISITION_STATE_DONE) exit_code() = 1;
    return;
  }
}

}  // namespace slopecast::cli
