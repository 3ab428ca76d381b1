// `slopecast record`: subscribes to a camera's frames and/or a daemon's
// measurements and writes them to a recording (daemon/io/recording.h).
//
// Two threads: this one receives (it never waits on the disk), a writer
// thread appends. Between them a bounded queue; when the disk falls behind
// and the queue is full, a message is dropped and counted as a recorder
// overflow. The recorder is an ordinary subscriber, so it never slows the
// daemon: a subscriber that falls behind loses messages at its own ZeroMQ
// queue, which the seq gaps count.
#include <unistd.h>

#include <atomic>
#include <condition_variable>
#include <deque>
#include <iostream>
#include <mutex>
#include <thread>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/frame_publisher.h"
#include "client/lib/interruptible_poll.h"
#include "client/lib/measurement_tally.h"
#include "daemon/io/recording.h"
#include "slopecast/v1/frame.pb.h"
#include "slopecast/v1/measurement.pb.h"
#include "slopecast/v1/recording.pb.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "record";

struct RecordOptions {
  std::string config;
  std::string frames_from;
  std::string measurements_from;
  std::string truth_from;
  bool no_frames = false, no_measurements = false;
  std::string out;
  std::uint64_t max_frames = 0;
  double duration_s = 0;
  std::uint64_t max_bytes = 0;
  std::uint64_t rotate_bytes = 0;
  std::size_t queue_messages = 4096;
  std::uint64_t queue_bytes = 512ull << 20;
  KeyOptions keys;
};

// Seq accounting for one stream: gaps are missed messages, a step back a
// restart of the source.
struct SeqTally {
  bool seen = false;
  std::uint64_t last = 0, received = 0, missed = 0, restarts = 0;
  void add(std::uint64_t seq) {
    ++received;
    if (seen && seq > last + 1 && seq - last - 1 < (1ull << 40)) missed += seq - last - 1;
    if (seen && seq <= last) ++restarts;
    seen = true;
    last = seq;
  }
};

class Queue {
 public:
  Queue(std::size_t max_messages, std::uint64_t max_bytes) : max_messages_(max_messages), max_bytes_(max_bytes) {}
  bool push(io::RecordedMessage&& m) {
    std::uint64_t size = 0;
    for (const auto& p : m.parts) size += p.size();
    {
      std::lock_guard lock(mutex_);
      if (items_.size() >= max_messages_ || bytes_ + size > max_bytes_) return false;
      bytes_ += size;
      items_.push_back(std::move(m));
    }
    ready_.notify_one();
    return true;
  }
  // False once closed and empty.
  bool pop(io::RecordedMessage& out) {
    std::unique_lock lock(mutex_);
    ready_.wait(lock, [&] { return !items_.empty() || closed_; });
    if (items_.empty()) return false;
    out = std::move(items_.front());
    items_.pop_front();
    for (const auto& p : out.parts) bytes_ -= p.size();
    return true;
  }
  void close() {
    {
      std::lock_guard lock(mutex_);
      closed_ = true;
    }
    ready_.notify_all();
  }

 private:
  std::mutex mutex_;
  std::condition_variable ready_;
  std::deque<io::RecordedMessage> items_;
  std::size_t max_messages_;
  std::uint64_t max_bytes_, bytes_ = 0;
  bool closed_ = false;
};

struct WriterResult {
  std::string error;
  std::vector<std::string> files;
  std::uint64_t records = 0, bytes = 0;
  std::atomic<bool> limit_reached{false};  // a size limit or a failed write: stop receiving
};

void run_record(RecordOptions o) {
  if (!o.config.empty()) {
    auto c = read_daemon_config(kCmd, o.config);
    if (!c) return;
    if (o.frames_from.empty()) o.frames_from = c->endpoints.frames_in;
    if (o.measurements_from.empty()) o.measurements_from = c->endpoints.measurements_out;
  }
  if (o.no_frames) o.frames_from.clear();
  if (o.no_measurements) o.measurements_from.clear();
  if (o.frames_from.empty() && o.measurements_from.empty() && o.truth_from.empty())
    return fail(kCmd, "nothing to record: give --frames-from and/or --measurements-from (or --config)");
  if (!o.frames_from.empty() && !endpoint_ok(kCmd, "--frames-from", o.frames_from)) return;
  if (!o.measurements_from.empty() && !endpoint_ok(kCmd, "--measurements-from", o.measurements_from)) return;
  if (!o.truth_from.empty() && !endpoint_ok(kCmd, "--truth-from", o.truth_from)) return;
  if (o.rotate_bytes && o.rotate_bytes < (1u << 20)) return fail(kCmd, "--rotate-bytes must be at least 1 MiB");
  const std::filesystem::path first_path = o.rotate_bytes ? io::rotated_path(o.out, 0) : std::filesystem::path(o.out);
  if (std::filesystem::exists(first_path))
    return fail(kCmd, fmt::format("'{}' exists; a recording is never overwritten", first_path.string()));
  {
    const auto dir = first_path.has_parent_path() ? first_path.parent_path() : std::filesystem::path(".");
    if (!std::filesystem::is_directory(dir) || ::access(dir.c_str(), W_OK) != 0)
      return fail(kCmd, fmt::format("cannot write in '{}' (no such folder, or no permission)", dir.string()));
  }
  std::optional<client::CurveClient> curve;
  if (!load_keys(kCmd, o.keys, curve)) return;

  zmq::context_t ctx(1);
  std::optional<zmq::socket_t> frames, measurements, truths;
  // A subscriber to everything on endpoint ("" leaves the socket unmade).
  auto subscribe = [&](std::optional<zmq::socket_t>& socket, const std::string& endpoint, int hwm, bool keyed) {
    if (endpoint.empty()) return;
    socket.emplace(ctx, zmq::socket_type::sub);
    socket->set(zmq::sockopt::linger, 0);
    if (keyed && curve) client::apply_curve(*socket, *curve);
    socket->set(zmq::sockopt::rcvhwm, hwm);
    socket->set(zmq::sockopt::subscribe, "");
    socket->connect(endpoint);
  };
  try {
    subscribe(frames, o.frames_from, 1000, false);
    subscribe(measurements, o.measurements_from, 10000, true);  // the daemon's endpoint: CURVE when configured
    subscribe(truths, o.truth_from, 10000, false);
  } catch (const zmq::error_t& e) {
    return fail(kCmd, fmt::format("cannot connect: {}", e.what()));
  }

  Queue queue(o.queue_messages, o.queue_bytes);
  std::atomic<bool> writer_done{false};
  WriterResult result;
  v1::RecordingHeader header;
  header.set_file_version(1);
  header.set_writer("slopecast record");
  header.set_frames_from(o.frames_from);
  header.set_measurements_from(o.measurements_from);
  std::thread writer([&] {
    std::unique_ptr<io::RecordingWriter> file;
    unsigned part = 0;
    std::uint64_t total_records = 0, total_bytes = 0;
    io::RecordedMessage m;
    auto finish_file = [&] {
      if (!file) return;
      if (auto e = file->close(); !e.empty() && result.error.empty()) result.error = e;
      total_bytes += file->bytes();
      file.reset();
    };
    while (queue.pop(m)) {
      if (result.limit_reached || !result.error.empty()) continue;  // drain
      if (!file || (o.rotate_bytes && file->bytes() >= o.rotate_bytes)) {
        finish_file();
        if (m.kind == io::RecordKind::kFrame && header.width_px() == 0) {
          v1::FrameHeader fh;
          if (fh.ParseFromString(m.parts[0])) {
            header.set_width_px(fh.width_px());
            header.set_height_px(fh.height_px());
            header.set_pixel_type(fh.pixel_type());
            header.set_source_id(fh.source_id());
          }
        }
        header.set_created_ns(client::wall_clock_ns());
        header.set_part(part);
        header.set_first_record(total_records);
        const auto path = o.rotate_bytes ? io::rotated_path(o.out, part) : std::filesystem::path(o.out);
        auto made = io::RecordingWriter::create(path, header);
        if (auto* e = std::get_if<std::string>(&made)) {
          result.error = *e;
          result.limit_reached = true;  // stops the receiving side too
          continue;
        }
        file = std::move(std::get<std::unique_ptr<io::RecordingWriter>>(made));
        result.files.push_back(path.string());
        ++part;
      }
      std::vector<std::string_view> parts(m.parts.begin(), m.parts.end());
      if (auto e = file->append(m.kind, m.received_ns, parts); !e.empty()) {
        result.error = e;
        result.limit_reached = true;
        continue;
      }
      ++total_records;
      if (o.max_bytes && total_bytes + file->bytes() >= o.max_bytes) result.limit_reached = true;
    }
    finish_file();
    result.records = total_records;
    result.bytes = total_bytes;
    writer_done = true;
  });

  SeqTally frame_seq, measurement_seq, truth_seq;
  std::uint64_t overflow_frames = 0, overflow_measurements = 0, overflow_truth = 0, malformed = 0, frames_queued = 0;
  std::cout << fmt::format("recording{}{} to {}{}\n", o.frames_from.empty() ? "" : " frames from " + o.frames_from,
                           o.measurements_from.empty() ? "" : " measurements from " + o.measurements_from, o.out,
                           o.rotate_bytes ? fmt::format(" (a new file every {} bytes)", o.rotate_bytes) : "")
            << std::flush;
  using clock = std::chrono::steady_clock;
  const auto start = clock::now();
  auto last_line = start;
  std::vector<zmq::pollitem_t> items;
  if (frames) items.push_back({frames->handle(), 0, ZMQ_POLLIN, 0});
  if (measurements) items.push_back({measurements->handle(), 0, ZMQ_POLLIN, 0});
  if (truths) items.push_back({truths->handle(), 0, ZMQ_POLLIN, 0});
  const char* stop_reason = "stopped by a signal";
  std::uint64_t last_frame_seq = 0;
  std::optional<clock::time_point> grace_until;
  auto receive_from = [&](zmq::socket_t& socket, io::RecordKind kind) {
    for (int burst = 0; burst < 256; ++burst) {
      io::RecordedMessage m;
      m.kind = kind;
      zmq::message_t part;
      if (!socket.recv(part, zmq::recv_flags::dontwait)) return;
      m.received_ns = client::wall_clock_ns();
      m.parts.emplace_back(part.to_string());
      while (part.more()) {
        (void)socket.recv(part);
        m.parts.emplace_back(part.to_string());
      }
      const bool frame = kind == io::RecordKind::kFrame;
      std::uint64_t seq = 0;
      if (frame) {
        v1::FrameHeader h;
        if (m.parts.size() != 2 || !h.ParseFromString(m.parts[0])) {
          ++malformed;
          continue;
        }
        seq = h.seq();
      } else if (kind == io::RecordKind::kTruth) {
        v1::FrameTruth h;
        if (m.parts.size() != 1 || !h.ParseFromString(m.parts[0])) {
          ++malformed;
          continue;
        }
        truth_seq.add(h.frame_seq());
        if (o.max_frames && frames_queued >= o.max_frames && h.frame_seq() > last_frame_seq) continue;
        if (!queue.push(std::move(m))) ++overflow_truth;
        continue;
      } else {
        v1::Measurement h;
        if (m.parts.size() != 1 || !h.ParseFromString(m.parts[0])) {
          ++malformed;
          continue;
        }
        seq = h.frame_seq();
      }
      (frame ? frame_seq : measurement_seq).add(seq);
      if (frame && o.max_frames && frames_queued >= o.max_frames) continue;
      if (!frame && o.max_frames && frames_queued >= o.max_frames && seq > last_frame_seq) continue;
      if (!queue.push(std::move(m))) {
        ++(frame ? overflow_frames : overflow_measurements);
      } else if (frame) {
        ++frames_queued;
        last_frame_seq = seq;
      }
    }
  };
  for (;;) {
    if (stop_requested()) break;
    if (writer_done || result.limit_reached) {
      stop_reason = "size limit reached";  // or a failed write: said after the writer has finished
      break;
    }
    if (o.max_frames && frames_queued >= o.max_frames) {
      // The frames are in; with measurements recorded too, wait (up to 2 s)
      // for the measurement of the last frame so that the file holds both.
      const bool measured = !measurements || (measurement_seq.seen && measurement_seq.last >= last_frame_seq);
      const bool told = !truths || (truth_seq.seen && truth_seq.last >= last_frame_seq);
      if (measured && told) {
        stop_reason = "frame limit reached";
        break;
      }
      if (!grace_until) grace_until = clock::now() + std::chrono::seconds(2);
      if (clock::now() >= *grace_until) {
        stop_reason = "frame limit reached (the last frames' measurements did not all arrive within 2 s)";
        break;
      }
    }
    if (o.duration_s > 0 && std::chrono::duration<double>(clock::now() - start).count() >= o.duration_s) {
      stop_reason = "duration reached";
      break;
    }
    if (client::interruptible_poll(items.data(), items.size(), std::chrono::milliseconds(100)) ==
        client::PollResult::kReady) {
      if (frames) receive_from(*frames, io::RecordKind::kFrame);
      if (measurements) receive_from(*measurements, io::RecordKind::kMeasurement);
      if (truths) receive_from(*truths, io::RecordKind::kTruth);
    }
    if (clock::now() - last_line >= std::chrono::seconds(1)) {
      last_line = clock::now();
      std::cout << fmt::format("  {:.0f} s: {} frames, {} measurements received; missed {} / {}; recorder overflow "
                               "{} / {}\n",
                               std::chrono::duration<double>(last_line - start).count(), frame_seq.received,
                               measurement_seq.received, frame_seq.missed, measurement_seq.missed, overflow_frames,
                               overflow_measurements)
                << std::flush;
    }
  }
  queue.close();
  writer.join();
  if (!result.error.empty()) stop_reason = "write failed";
  std::cout << fmt::format("{}: {} records in {} file(s), {} bytes{}\n", stop_reason, result.records,
                           result.files.size(), result.bytes,
                           result.files.empty() ? " (nothing arrived)" : ": " + fmt::format("{}", fmt::join(result.files, ", ")));
  std::cout << fmt::format("frames: received {}, missed {} (seq gaps), source restarts {}, dropped by the recorder {}\n",
                           frame_seq.received, frame_seq.missed, frame_seq.restarts, overflow_frames);
  std::cout << fmt::format("measurements: received {}, missed {} (seq gaps), restarts {}, dropped by the recorder {}\n",
                           measurement_seq.received, measurement_seq.missed, measurement_seq.restarts,
                           overflow_measurements);
  if (truths)
    std::cout << fmt::format("truth: received {}, missed {} (seq gaps), dropped by the recorder {}\n",
                             truth_seq.received, truth_seq.missed, overflow_truth);
  if (malformed) std::cout << fmt::format("malformed messages ignored: {}\n", malformed);
  if (!result.error.empty()) return fail(kCmd, result.error);
  if (stop_requested()) exit_code() = stopped_exit_code();
}

}  // namespace

void add_record_command(CLI::App& app) {
  auto o = std::make_shared<RecordOptions>();
  auto* cmd = app.add_subcommand("record", "Record frames and/or measurements to a crash-safe file");
  cmd->add_option("--config", o->config,
                  "Take the frames endpoint (frames_in) and the measurements endpoint from this slopecastd config")
      ->check(CLI::ExistingFile);
  cmd->add_option("--frames-from", o->frames_from, "Camera endpoint to subscribe to for frames");
  cmd->add_option("--measurements-from", o->measurements_from, "Daemon endpoint to subscribe to for measurements");
  cmd->add_option("--truth-from", o->truth_from, "Simulator endpoint (`slopecast sim --truth-out`) for each frame's truth");
  cmd->add_flag("--no-frames", o->no_frames, "With --config: record measurements only");
  cmd->add_flag("--no-measurements", o->no_measurements, "With --config: record frames only");
  cmd->add_option("--out", o->out, "Recording file to create (never overwritten; with --rotate-bytes, NAME.0000.screc, "
                                   "NAME.0001.screc, ...)")
      ->required();
  cmd->add_option("--frames", o->max_frames, "Stop after this many frames (0: no limit)")->capture_default_str();
  cmd->add_option("--duration-s", o->duration_s, "Stop after this long (0: until Ctrl-C)")->capture_default_str()
      ->check(CLI::NonNegativeNumber);
  cmd->add_option("--max-bytes", o->max_bytes, "Stop when the files together reach this size (0: no limit)")
      ->capture_default_str();
  cmd->add_option("--rotate-bytes", o->rotate_bytes, "Start a new file when the current one reaches this size (0: one file)")
      ->capture_default_str();
  cmd->add_option("--queue-messages", o->queue_messages,
                  "Messages held between receiving and writing; beyond it a message is dropped and counted")
      ->capture_default_str()->check(CLI::Range(1, 1000000));
  add_key_options(cmd, o->keys);
  cmd->callback([o] { run_record(*o); });
}

}  // namespace slopecast::cli
