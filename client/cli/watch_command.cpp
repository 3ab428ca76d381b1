// `slopecast watch`: subscribe to measurements and print a compact live view,
// one line per interval, and a closing summary.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/measurement_subscriber.h"
#include "client/lib/measurement_tally.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "watch";

struct WatchOptions {
  KeyOptions keys;
  std::string config;
  std::string measurements = io::kDefaultMeasurementsEndpoint;
  double duration_s = 0.0;   // 0: until interrupted or count reached
  std::uint64_t count = 0;   // 0: no limit
  double interval_s = 1.0;
  double idle_timeout_s = 0.0;  // 0: wait forever for the first/next measurement
};

void print_summary(const client::TallySummary& s) {
  std::cout << fmt::format(
      "summary: {} measurements at {:.1f} Hz, {} frames missing from the sequence\n"
      "  latency camera -> watch   median {:.1f} us  p99 {:.1f} us\n"
      "  latency in daemon         median {:.1f} us  p99 {:.1f} us  (frame received -> measurement published)\n"
      "  slope rms                 x {:.4f} px  y {:.4f} px  (valid subapertures)\n"
      "  valid subapertures        {:.1f} of {} per frame\n",
      s.measurements, s.rate_hz, s.seq_gaps, s.end_to_end_median_us, s.end_to_end_p99_us, s.daemon_median_us,
      s.daemon_p99_us, s.slope_rms_x_px, s.slope_rms_y_px, s.mean_valid, s.subapertures);
}

void run_watch(WatchOptions o) {
  if (!o.config.empty()) {
    auto c = read_daemon_config(kCmd, o.config);
    if (!c) return;
    o.measurements = c->endpoints.measurements_out;
  }
  if (!endpoint_ok(kCmd, "--measurements", o.measurements)) return;
  zmq::context_t ctx(1);
  std::optional<client::CurveClient> curve;
  if (!load_keys(kCmd, o.keys, curve)) return;
  client::MeasurementSubscriber sub(ctx, o.measurements, curve);
  client::MeasurementTally total, interval;
  using clock = std::chrono::steady_clock;
  const auto start = clock::now();
  auto next_line = start + std::chrono::duration<double>(o.interval_s);
  auto last_seen = start;
  std::cout << "watching " << o.measurements << (o.duration_s > 0 ? fmt::format(" for {:.0f} s", o.duration_s) : "")
            << " (Ctrl-C to stop)\n";
  while (!stop_requested()) {
    const auto now = clock::now();
    if (o.duration_s > 0 && now - start >= std::chrono::duration<double>(o.duration_s)) break;
    if (o.count > 0 && total.count() >= o.count) break;
    if (o.idle_timeout_s > 0 && now - last_seen >= std::chrono::duration<double>(o.idle_timeout_s)) {
      std::cerr << fmt::format("slopecast watch: no measurement for {:.1f} s\n", o.idle_timeout_s);
      exit_code() = 1;
      break;
    }
    if (now >= next_line) {
      std::cout << format_tally_line(interval.summary()) << "\n" << std::flush;
      interval.clear();
      next_line += std::chrono::duration_cast<clock::duration>(std::chrono::duration<double>(o.interval_s));
    }
    auto m = sub.receive(std::chrono::milliseconds(50));
    if (!m) continue;
    const std::uint64_t t = client::wall_clock_ns();
    last_seen = clock::now();
    total.add(*m, t);
    interval.add(*m, t);
  }
  if (stop_requested()) std::cout << "stopped by a signal\n";
  print_summary(total.summary());
  if (sub.malformed() > 0) std::cout << "  malformed messages skipped: " << sub.malformed() << "\n";
  if (total.count() == 0 && exit_code() == 0 && !stop_requested()) {
    std::cerr << "slopecast watch: received no measurement\n";
    exit_code() = 1;
  }
}

}  // namespace

void add_watch_command(CLI::App& app) {
  auto opts = std::make_shared<WatchOptions>();
  auto* cmd = app.add_subcommand("watch", "Print a live view of slopecastd's measurements and a summary");
  auto* config = cmd->add_option("--config", opts->config,
                                 "Take the measurement endpoint from this slopecastd config file")
                    ->check(CLI::ExistingFile);
  cmd->add_option("--measurements", opts->measurements, "Daemon measurement endpoint")
      ->capture_default_str()
      ->excludes(config);
  cmd->add_option("--duration-s", opts->duration_s, "Stop after this many seconds (0: no limit)")
      ->check(CLI::NonNegativeNumber);
  cmd->add_option("--count", opts->count, "Stop after this many measurements (0: no limit)");
  cmd->add_option("--interval-s", opts->interval_s, "Seconds between live lines")
      ->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--idle-timeout-s", opts->idle_timeout_s,
                  "Fail if no measurement arrives for this many seconds (0: wait forever)")
      ->check(CLI::NonNegativeNumber);
  add_key_options(cmd, opts->keys);
  cmd->callback([opts] { run_watch(*opts); });
}

}  // namespace slopecast::cli
