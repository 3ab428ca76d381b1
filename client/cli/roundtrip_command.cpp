// `slopecast roundtrip`: how long a frame takes to come back as a
// measurement, against a bare relay in the same run.
//
// It stands in for the camera of a running slopecastd (binding the
// daemon's frames endpoint from its config), publishes simulated frames of
// the configured camera at a fixed rate, and times each one until its
// measurement arrives on measurements_out. Alternating with those, in
// blocks, it sends the same frames through a built-in bare relay (a thread
// that receives frames as the daemon does and answers each with its seq,
// client/lib/bare_relay.h) over the same kind of transport, so the
// daemon's own cost shows as a ratio to the transport's. It prints
// p50 / p99 / p99.9 / max latency, frames lost and the rate achieved per
// path. Lost frames are counted, never waited for beyond a second.
#include <algorithm>
#include <atomic>
#include <deque>
#include <cstring>
#include <filesystem>
#include <iostream>
#include <memory>
#include <thread>
#include <unistd.h>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/bare_relay.h"
#include "client/lib/frame_publisher.h"
#include "client/lib/interruptible_poll.h"
#include "client/sim/frame_bank.h"
#include "daemon/core/metrics/percentile.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/wire_codec.h"
#include "slopecast/v1/measurement.pb.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "roundtrip";

struct RoundtripOptions {
  std::string config;
  std::uint64_t frames = 10000;  // per path
  double rate_hz = 1000.0;
  int block = 500;               // frames per block before switching path
  int warmup = 200;              // frames per path sent first and not counted
  bool relay = true;
  std::string relay_frames, relay_replies;  // default: beside the daemon's, same transport
};

// One path's record. The sender thread writes sent_ns (atomically: the
// receiver thread reads it when the answer comes); the receiver owns the rest.
struct Path {
  explicit Path(std::uint64_t total) : sent_ns(total), seen(total, false) {}
  std::string name;
  std::vector<std::atomic<std::int64_t>> sent_ns;  // by seq; 0 = not sent (yet)
  std::vector<float> latency_us;                   // of frames received, in arrival order
  std::uint64_t sent = 0, received = 0;
  std::vector<bool> seen;
};

std::int64_t now_ns() {
  return std::chrono::duration_cast<std::chrono::nanoseconds>(std::chrono::steady_clock::now().time_since_epoch())
      .count();
}

// A free endpoint of the same transport as `like`, for the relay.
std::string beside(const std::string& like, const char* what, int port) {
  if (like.rfind("ipc://", 0) == 0)
    return fmt::format("ipc://{}/slopecast-roundtrip-{}-{}",
                       std::filesystem::temp_directory_path().string(), getpid(), what);
  return fmt::format("tcp://127.0.0.1:{}", port);
}

void note(Path& p, std::uint64_t seq, std::uint64_t counted_from, std::int64_t arrived_ns) {
  if (seq < counted_from || seq >= p.sent_ns.size()) return;
  const std::int64_t sent = p.sent_ns[seq].load(std::memory_order_acquire);
  if (sent == 0) return;
  if (p.seen[seq]) return;  // a repeat: timed once
  p.seen[seq] = true;
  ++p.received;
  p.latency_us.push_back(static_cast<float>((arrived_ns - sent) * 1e-3));
}

// A path's latency figures, us (nearest-rank percentiles); all 0 when
// nothing came back.
struct Latency {
  float p50 = 0, p99 = 0, p999 = 0, max = 0;
};
Latency summarise(std::vector<float> l) {
  if (l.empty()) return {};
  std::sort(l.begin(), l.end());
  const std::span<const float> s(l);
  return {core::nearest_rank(s, 0.5), core::nearest_rank(s, 0.99), core::nearest_rank(s, 0.999), l.back()};
}

void report(const Path& p, std::uint64_t counted, const Latency& l) {
  if (p.latency_us.empty()) {
    std::cout << fmt::format("  {:<10} {:>7} {:>9} {:>7}      (nothing came back)\n", p.name, counted, 0, counted);
    return;
  }
  std::cout << fmt::format("  {:<10} {:>7} {:>9} {:>7} {:>9.1f} {:>9.1f} {:>9.1f} {:>9.1f}\n", p.name, counted,
                           p.received, counted - p.received, l.p50, l.p99, l.p999, l.max);
}

void run_roundtrip(RoundtripOptions o) {
  if (o.config.empty()) return fail(kCmd, "--config is required: the daemon's config names its endpoints and camera");
  const auto c = read_daemon_config(kCmd, o.config);
  if (!c) return;
  const auto& eps = c->endpoints;
  const auto& pipe = c->pipeline;
  if (o.relay_frames.empty()) o.relay_frames = beside(eps.frames_in, "frames", 10143);
  if (o.relay_replies.empty()) o.relay_replies = beside(eps.frames_in, "replies", 10144);
  for (const auto& [opt, e] : {std::pair{"--relay-frames", &o.relay_frames}, std::pair{"--relay-replies", &o.relay_replies}})
    if (!endpoint_ok(kCmd, opt, *e)) return;

  // The camera's frames: a bank of distinct simulated frames, cycled.
  sim::SpotFieldSettings field;
  field.grid = pipe.grid;
  sim::DetectorModel detector;
  detector.full_scale_adu = std::min(detector.full_scale_adu, core::full_scale_adu(pipe.camera.format));
  const auto bank = sim::make_frame_bank(field, detector, pipe.camera, 0.0, 16, 1, [] { return !stop_requested(); });
  if (stop_requested()) return;

  zmq::context_t ctx(1);
  std::unique_ptr<client::FramePublisher> to_daemon, to_relay;
  std::unique_ptr<client::BareRelay> relay;
  zmq::socket_t measurements(ctx, zmq::socket_type::sub), replies(ctx, zmq::socket_type::sub);
  try {
    to_daemon = std::make_unique<client::FramePublisher>(ctx, eps.frames_in, c->frame_queue_depth);
    if (o.relay) {
      to_relay = std::make_unique<client::FramePublisher>(ctx, o.relay_frames, c->frame_queue_depth);
      relay = std::make_unique<client::BareRelay>(ctx, o.relay_frames, o.relay_replies, c->frame_queue_depth);
    }
  } catch (const zmq::error_t& e) {
    return fail(kCmd, fmt::format("cannot bind the frames endpoints ({}): is a camera or `slopecast sim` already "
                                  "publishing there?", e.what()));
  }
  for (zmq::socket_t* s : {&measurements, &replies}) {
    s->set(zmq::sockopt::linger, 0);
    s->set(zmq::sockopt::rcvhwm, 100000);
    s->set(zmq::sockopt::subscribe, "");
  }
  measurements.connect(eps.measurements_out);
  if (o.relay) replies.connect(o.relay_replies);
  std::cout << fmt::format("waiting for slopecastd to subscribe on {} ...\n", eps.frames_in) << std::flush;
  if (!to_daemon->wait_for_subscriber(std::chrono::seconds(10)) ||
      (to_relay && !to_relay->wait_for_subscriber(std::chrono::seconds(10)))) {
    if (stop_requested()) return;
    return fail(kCmd, "no subscriber on the frames endpoint within 10 s: is slopecastd running with this config?");
  }

  const std::uint64_t total = o.frames + static_cast<std::uint64_t>(o.warmup);
  std::deque<Path> paths;
  paths.emplace_back(total).name = "daemon";
  if (o.relay) paths.emplace_back(total).name = "relay";
  for (auto& p : paths) p.latency_us.reserve(o.frames);
  const auto type = io::to_wire(pipe.camera.format);
  const auto period = std::chrono::nanoseconds(static_cast<std::int64_t>(1e9 / o.rate_hz));
  auto next = std::chrono::steady_clock::now();
  // The receiver: its own thread, blocked in poll, so that every answer is
  // timed when it arrives, whatever the sender is doing.
  std::atomic<bool> done{false};
  std::thread receiver([&] {
    zmq::pollitem_t items[] = {{measurements.handle(), 0, ZMQ_POLLIN, 0}, {replies.handle(), 0, ZMQ_POLLIN, 0}};
    v1::Measurement m;
    zmq::message_t msg;
    while (!done.load()) {
      if (client::interruptible_poll(items, o.relay ? 2 : 1, std::chrono::milliseconds(20)) !=
          client::PollResult::kReady)
        continue;
      const std::int64_t arrived = now_ns();
      while (measurements.recv(msg, zmq::recv_flags::dontwait))
        if (m.ParseFromArray(msg.data(), static_cast<int>(msg.size())))
          note(paths[0], m.frame_seq(), static_cast<std::uint64_t>(o.warmup), arrived);
      while (o.relay && replies.recv(msg, zmq::recv_flags::dontwait))
        if (msg.size() == 8) {
          std::uint64_t seq = 0;
          std::memcpy(&seq, msg.data(), 8);
          note(paths[1], seq, static_cast<std::uint64_t>(o.warmup), arrived);
        }
    }
  });
  // Warm-up on every path first, then blocks alternating between paths.
  std::vector<std::uint64_t> seq(paths.size(), 0);
  auto timed_from = std::chrono::steady_clock::now();
  std::uint64_t block_left = static_cast<std::uint64_t>(o.warmup);
  std::size_t on = 0;
  bool warming = true;
  while (!stop_requested()) {
    if (block_left == 0) {
      on = (on + 1) % paths.size();
      if (warming && on == 0) warming = false;
      block_left = warming ? static_cast<std::uint64_t>(o.warmup) : static_cast<std::uint64_t>(o.block);
      if (std::all_of(seq.begin(), seq.end(), [&](std::uint64_t s) { return s >= total; })) break;
      if (seq[on] >= total) continue;
    }
    std::this_thread::sleep_until(next);
    Path& p = paths[on];
    const std::uint64_t s = seq[on]++;
    const auto& pixels = bank.frames[s % bank.frames.size()];
    const auto header = client::make_frame_header(s, 0, pipe.camera.width_px, pipe.camera.height_px, type);
    if (s == static_cast<std::uint64_t>(o.warmup) && on == 0) timed_from = std::chrono::steady_clock::now();
    p.sent_ns[s].store(now_ns(), std::memory_order_release);
    (on == 0 ? *to_daemon : *to_relay).publish(header, pixels);
    ++p.sent;
    --block_left;
    if (seq[on] >= total) block_left = 0;
    next += period;
    const auto now = std::chrono::steady_clock::now();
    if (now - next > 10 * period) next = now;  // fell far behind: do not burst to catch up
  }
  const auto timed_until = std::chrono::steady_clock::now();
  // Stragglers: a second (unless asked to stop), then the receiver stops.
  for (int i = 0; i < 50 && !stop_requested(); ++i) std::this_thread::sleep_for(std::chrono::milliseconds(20));
  done.store(true);
  receiver.join();
  // Frames sent after the warm-up, per path.
  auto counted = [&](const Path& p) {
    return p.sent > static_cast<std::uint64_t>(o.warmup) ? p.sent - o.warmup : 0;
  };
  std::uint64_t timed = 0;
  for (const auto& p : paths) timed += counted(p);
  const double span = std::chrono::duration<double>(timed_until - timed_from).count();
  std::cout << fmt::format("\n{} frames per path at {} Hz ({} x {} {}), blocks of {} alternating, after {} warm-up frames;"
                           " latency = frame published here -> its answer received here, us\n",
                           o.frames, o.rate_hz, pipe.camera.width_px, pipe.camera.height_px,
                           core::pixel_format_name(pipe.camera.format), o.block, o.warmup);
  std::cout << fmt::format("frames sent at {:.1f} Hz over both paths (asked {:.1f} Hz)\n", span > 0 ? timed / span : 0.0,
                           o.rate_hz);
  std::cout << fmt::format("  {:<10} {:>7} {:>9} {:>7} {:>9} {:>9} {:>9} {:>9}\n", "path", "sent", "received",
                           "lost", "p50", "p99", "p99.9", "max");
  std::vector<Latency> figures;
  for (const auto& p : paths) {
    figures.push_back(summarise(p.latency_us));
    report(p, counted(p), figures.back());
  }
  if (o.relay && !paths[0].latency_us.empty() && !paths[1].latency_us.empty())
    std::cout << fmt::format("  daemon / relay: p50 {:.2f}x  p99 {:.2f}x  p99.9 {:.2f}x\n",
                             figures[0].p50 / figures[1].p50, figures[0].p99 / figures[1].p99,
                             figures[0].p999 / figures[1].p999);
  if (stop_requested()) std::cout << "(interrupted: the figures cover what was sent)\n";
}

}  // namespace

void add_roundtrip_command(CLI::App& app) {
  auto opts = std::make_shared<RoundtripOptions>();
  auto* cmd = app.add_subcommand(
      "roundtrip", "Time frames to slopecastd and back against a bare relay (the daemon must be running)");
  cmd->add_option("--config", opts->config, "The running slopecastd's config: its endpoints and camera")
      ->required()
      ->check(CLI::ExistingFile);
  cmd->add_option("--frames", opts->frames, "Frames timed per path (after the warm-up)")
      ->capture_default_str()->check(CLI::Range(1, 100000000));
  cmd->add_option("--rate-hz", opts->rate_hz, "Frames per second sent (both paths together)")
      ->capture_default_str()->check(CLI::Range(1.0, 100000.0));
  cmd->add_option("--block", opts->block, "Frames sent to one path before switching to the other")
      ->capture_default_str()->check(CLI::Range(1, 1000000));
  cmd->add_option("--warmup", opts->warmup, "Frames per path sent first and not counted")
      ->capture_default_str()->check(CLI::Range(0, 1000000));
  cmd->add_flag("!--no-relay", opts->relay, "Time the daemon only");
  cmd->add_option("--relay-frames", opts->relay_frames,
                  "Endpoint the relay's frames go through (default: beside the daemon's, same transport)");
  cmd->add_option("--relay-replies", opts->relay_replies, "Endpoint the relay answers on (default as above)");
  cmd->callback([opts] { run_roundtrip(*opts); });
}

}  // namespace slopecast::cli
