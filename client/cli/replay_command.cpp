// `slopecast replay`: publishes the frames of a recording (or of a FITS
// cube) as a camera would, at the recorded cadence, at a chosen rate, or
// flow-controlled: each frame waits for the daemon's measurement of the one
// before, so nothing is lost however slow the daemon is.
#include <algorithm>
#include <deque>
#include <fstream>
#include <iostream>
#include <thread>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/frame_publisher.h"
#include "client/lib/measurement_subscriber.h"
#include "client/lib/measurement_tally.h"
#include "client/cli/frame_source.h"
#include "daemon/io/recording.h"
#include "daemon/io/fits_image.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "replay";

struct ReplayOptions {
  std::vector<std::string> inputs;
  std::string config;
  std::string frames_out;
  std::string measurements_from;
  std::string control;
  double rate_hz = 0;  // 0: the recorded cadence (recordings) / 100 Hz (cubes)
  bool flow = false;
  std::size_t flow_window = 1;
  double flow_timeout_s = 5.0;
  std::uint64_t first = 0, count = 0;
  std::uint64_t loops = 1;
  bool renumber = false;
  std::string save_measurements;
  double wait_subscriber_s = 10.0;
  std::string source_id = "slopecast-replay";
  KeyOptions keys;
};

void run_replay(ReplayOptions o) {
  std::string config_measurements, config_control;
  if (!o.config.empty()) {
    auto c = read_daemon_config(kCmd, o.config);
    if (!c) return;
    if (o.frames_out.empty()) o.frames_out = c->endpoints.frames_in;
    if (o.measurements_from.empty()) o.measurements_from = c->endpoints.measurements_out;
    if (o.control.empty()) o.control = c->endpoints.control;
  }
  if (o.frames_out.empty()) o.frames_out = io::kDefaultFramesEndpoint;
  if (!endpoint_ok(kCmd, "--frames-out", o.frames_out)) return;
  if (o.flow && (o.measurements_from.empty() || o.control.empty()))
    return fail(kCmd, "--flow needs the daemon's measurements and control endpoints: give --config (or "
                      "--measurements-from and --control)");
  if (!o.save_measurements.empty() && !o.flow) return fail(kCmd, "--save-measurements goes with --flow");
  std::unique_ptr<FrameSource> source;
  const bool cube = o.inputs.size() == 1 && is_fits(o.inputs[0]);
  if (cube) {
    auto opened = io::FitsFrameReader::open(o.inputs[0]);
    if (auto* e = std::get_if<io::FitsError>(&opened)) return fail(kCmd, e->message);
    source = std::make_unique<CubeSource>(kCmd, std::move(std::get<std::unique_ptr<io::FitsFrameReader>>(opened)),
                                          o.source_id, o.inputs[0]);
    if (o.rate_hz == 0 && !o.flow) o.rate_hz = 100;
  } else {
    for (const auto& in : o.inputs) {
      if (is_fits(in)) return fail(kCmd, fmt::format("'{}' is a FITS file: replay one cube at a time", in));
      // Every file must open before the first frame goes out.
      auto opened = io::RecordingReader::open(in);
      if (auto* e = std::get_if<std::string>(&opened)) return fail(kCmd, *e);
    }
    source = std::make_unique<RecordingSource>(kCmd, o.inputs);
  }
  const bool renumber = o.renumber || o.loops != 1;
  std::optional<client::CurveClient> curve;
  if (!load_keys(kCmd, o.keys, curve)) return;

  zmq::context_t ctx(1);
  std::unique_ptr<client::FramePublisher> pub;
  try {
    pub = std::make_unique<client::FramePublisher>(ctx, o.frames_out, 1000);
  } catch (const zmq::error_t& e) {
    return fail(kCmd, fmt::format("cannot bind {}: {}", o.frames_out, e.what()));
  }
  std::unique_ptr<client::MeasurementSubscriber> sub;
  std::unique_ptr<io::RecordingWriter> saved;
  if (o.flow) {
    // Make sure the daemon holds our measurement subscription before the
    // first frame: its status counts subscriptions.
    client::ControlClient control(ctx, o.control, curve);
    auto before = control.wait_ready(std::chrono::seconds(10));
    if (auto* e = std::get_if<std::string>(&before)) return fail(kCmd, "daemon not answering: " + *e);
    const auto have = std::get<v1::ControlReply>(before).status().measurement_subscribers();
    sub = std::make_unique<client::MeasurementSubscriber>(ctx, o.measurements_from, curve);
    bool subscribed = false;
    for (int i = 0; i < 100 && !subscribed && !stop_requested(); ++i) {
      auto r = control.status(std::chrono::seconds(2));
      if (auto* reply = std::get_if<v1::ControlReply>(&r))
        subscribed = reply->status().measurement_subscribers() > have;
      if (!subscribed) std::this_thread::sleep_for(std::chrono::milliseconds(50));
    }
    if (!subscribed) return fail(kCmd, "the daemon did not register our measurement subscription within 5 s");
    if (!o.save_measurements.empty()) {
      v1::RecordingHeader h;
      h.set_file_version(1);
      h.set_writer("slopecast replay --save-measurements");
      h.set_measurements_from(o.measurements_from);
      h.set_created_ns(client::wall_clock_ns());
      auto made = io::RecordingWriter::create(o.save_measurements, h);
      if (auto* e = std::get_if<std::string>(&made)) return fail(kCmd, *e);
      saved = std::move(std::get<std::unique_ptr<io::RecordingWriter>>(made));
    }
  }
  std::cout << fmt::format("replaying {} on {}: {}{}\n", source->describe(), o.frames_out,
                           o.flow ? "flow-controlled (each frame waits for its measurement)"
                                  : o.rate_hz > 0 ? fmt::format("{} Hz", o.rate_hz) : std::string("recorded cadence"),
                           o.loops == 1 ? "" : o.loops == 0 ? ", looping until stopped" : fmt::format(", {} loops", o.loops))
            << std::flush;
  if (o.wait_subscriber_s > 0 &&
      !pub->wait_for_subscriber(std::chrono::milliseconds(static_cast<long>(o.wait_subscriber_s * 1000)))) {
    if (stop_requested()) return;
    return fail(kCmd, fmt::format("no subscriber on {} within {} s", o.frames_out, o.wait_subscriber_s));
  }

  using clock = std::chrono::steady_clock;
  const auto start = clock::now();
  auto last_line = start;
  std::uint64_t sent = 0, unanswered = 0, out_seq = 0, index = 0;
  bool have_t0 = false;
  std::uint64_t t0_ns = 0;
  clock::time_point pace_origin = start;
  Frame f;
  v1::FrameHeader h;
  const auto keep_going = [] { return !stop_requested(); };
  // --flow: frames sent whose measurement has not come back, oldest first.
  // settle(n) waits until fewer than n are outstanding; a frame whose
  // measurement does not come within the timeout is counted and given up.
  std::deque<std::uint64_t> in_flight;
  bool save_failed = false;
  auto settle = [&](std::size_t n) {
    while (in_flight.size() >= n && !in_flight.empty() && !stop_requested()) {
      const auto deadline = clock::now() + std::chrono::duration<double>(o.flow_timeout_s);
      bool answered = false;
      while (!answered && !stop_requested() && clock::now() < deadline) {
        auto m = sub->receive(std::chrono::milliseconds(100));
        if (!m) continue;
        // Measurements come in frame order; one for a later frame means the
        // daemon dropped or rejected the ones before it.
        while (!in_flight.empty() && in_flight.front() != m->frame_seq() &&
               std::find(in_flight.begin(), in_flight.end(), m->frame_seq()) != in_flight.end()) {
          in_flight.pop_front();
          ++unanswered;
        }
        if (in_flight.empty() || in_flight.front() != m->frame_seq()) continue;
        in_flight.pop_front();
        answered = true;
        if (saved) {
          const std::string bytes = m->SerializeAsString();
          const std::string_view part[] = {bytes};
          if (auto e = saved->append(io::RecordKind::kMeasurement, client::wall_clock_ns(), part); !e.empty()) {
            fail(kCmd, e);
            save_failed = true;
            return false;
          }
        }
      }
      if (!answered && !stop_requested()) {
        in_flight.pop_front();
        ++unanswered;
      }
    }
    return true;
  };
  for (std::uint64_t loop = 0; (o.loops == 0 || loop < o.loops) && !stop_requested(); ++loop) {
    if (loop > 0) source->rewind();
    index = 0;
    have_t0 = false;
    while (!stop_requested() && source->next(f)) {
      const std::uint64_t i = index++;
      if (i < o.first) continue;
      if (o.count && i >= o.first + o.count) break;
      // Pace.
      if (!o.flow) {
        clock::time_point due;
        if (o.rate_hz > 0) {
          due = start + std::chrono::duration_cast<clock::duration>(std::chrono::duration<double>(sent / o.rate_hz));
        } else {
          if (!have_t0) {
            have_t0 = true;
            t0_ns = f.time_ns;
            pace_origin = clock::now();
          }
          due = pace_origin + std::chrono::nanoseconds(f.time_ns >= t0_ns ? f.time_ns - t0_ns : 0);
        }
        while (!stop_requested() && clock::now() < due)
          std::this_thread::sleep_for(std::min<clock::duration>(due - clock::now(), std::chrono::milliseconds(50)));
        if (stop_requested()) break;
      }
      std::uint64_t seq = f.seq;
      if (renumber) {
        h.ParseFromString(f.header);
        h.set_seq(seq = out_seq);
        f.header = h.SerializeAsString();
      }
      ++out_seq;
      if (!pub->publish_encoded_waiting(f.header, std::as_bytes(std::span(f.pixels.data(), f.pixels.size())),
                                        keep_going))
        break;
      ++sent;
      if (o.flow) {
        in_flight.push_back(seq);
        if (!settle(o.flow_window)) return;
      }
      if (clock::now() - last_line >= std::chrono::seconds(1)) {
        last_line = clock::now();
        const double t = std::chrono::duration<double>(last_line - start).count();
        std::cout << fmt::format("  {:.0f} s: {} frames sent ({:.1f} Hz){}\n", t, sent, sent / t,
                                 o.flow ? fmt::format(", {} without a measurement", unanswered) : "")
                  << std::flush;
      }
    }
  }
  if (o.flow && !save_failed && !settle(1)) return;  // the last frames' measurements
  if (saved)
    if (auto e = saved->close(); !e.empty()) return fail(kCmd, e);
  const double elapsed = std::chrono::duration<double>(clock::now() - start).count();
  std::cout << fmt::format("sent {} frames in {:.2f} s ({:.1f} Hz){}{}\n", sent, elapsed,
                           elapsed > 0 ? sent / elapsed : 0.0,
                           o.flow ? fmt::format("; {} without a measurement within {} s", unanswered, o.flow_timeout_s)
                                  : "",
                           stop_requested() ? "; stopped by a signal" : "");
  if (auto* c = dynamic_cast<CubeSource*>(source.get()); c && c->error()) exit_code() = 2;
  if (auto* r = dynamic_cast<RecordingSource*>(source.get()); r && r->problems()) {
    std::cout << fmt::format("{} damaged or torn record(s) skipped (warnings above)\n", r->problems());
    exit_code() = 1;
  }
  if (unanswered) exit_code() = 1;
  if (stop_requested()) exit_code() = stopped_exit_code();
}

}  // namespace

void add_replay_command(CLI::App& app) {
  auto o = std::make_shared<ReplayOptions>();
  auto* cmd = app.add_subcommand("replay", "Publish a recording (or a FITS cube) as a camera would");
  cmd->add_option("inputs", o->inputs,
                  "Recording files in order (a rotated series: NAME.*.screc), or one FITS cube (BITPIX 8, 16, 32, "
                  "-32, -64)")
      ->required()->check(CLI::ExistingFile);
  cmd->add_option("--config", o->config,
                  "Take the frames endpoint to publish on, and the daemon's measurements and control endpoints, "
                  "from this slopecastd config")
      ->check(CLI::ExistingFile);
  cmd->add_option("--frames-out", o->frames_out, "Endpoint to bind and publish frames on");
  cmd->add_option("--measurements-from", o->measurements_from, "--flow: the daemon's measurements endpoint");
  cmd->add_option("--control", o->control, "--flow: the daemon's control endpoint");
  cmd->add_option("--rate-hz", o->rate_hz, "Fixed rate (default: the recorded cadence; 100 Hz for a FITS cube)")
      ->check(CLI::Range(0.01, 1e6));
  cmd->add_flag("--flow", o->flow,
                "Flow-controlled: send each frame only after the daemon's measurement of the one before (lossless, "
                "as fast as the daemon goes)");
  cmd->add_option("--flow-window", o->flow_window,
                  "--flow: frames sent ahead of the last measurement received (1: strictly one at a time; more "
                  "overlaps transport and measuring; keep it at most the daemon's frame_queue_depth)")
      ->capture_default_str()->check(CLI::Range(1, 1024));
  cmd->add_option("--flow-timeout-s", o->flow_timeout_s, "--flow: how long to wait for a measurement before going on")
      ->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--first", o->first, "Skip this many frames first")->capture_default_str();
  cmd->add_option("--count", o->count, "Send at most this many frames per loop (0: all)")->capture_default_str();
  cmd->add_option("--loops", o->loops, "Times through the input (0: until Ctrl-C); more than one renumbers seq")
      ->capture_default_str();
  cmd->add_flag("--renumber", o->renumber, "Number frames 0, 1, 2, ... instead of keeping the recorded seq");
  cmd->add_option("--save-measurements", o->save_measurements,
                  "--flow: write every measurement received to this recording (a new file)");
  cmd->add_option("--wait-subscriber-s", o->wait_subscriber_s,
                  "Wait up to this long for a subscriber before the first frame (0: do not wait)")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--source-id", o->source_id, "source_id of frames made from a FITS cube")->capture_default_str();
  add_key_options(cmd, o->keys);
  cmd->callback([o] { run_replay(*o); });
}

}  // namespace slopecast::cli
