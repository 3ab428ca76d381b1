// `slopecast sim`: a stand-in lenslet camera. Publishes frames of
// pixel-integrated Gaussian spots at known sub-pixel offsets (new offsets
// every frame) with photon and read noise on a bias, at a fixed rate, and can
// write the true offsets to a CSV file and a mean dark frame to FITS.
#include <fstream>
#include <iostream>
#include <memory>
#include <thread>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/frame_publisher.h"
#include "client/lib/measurement_tally.h"
#include "client/sim/frame_bank.h"
#include "daemon/io/fits_image.h"

namespace slopecast::cli {

namespace {

struct SimOptions {
  std::string frames_out = "tcp://127.0.0.1:6110";
  int subapertures_x = 16, subapertures_y = 16, pitch_px = 15;
  double rate_hz = 1000.0;
  std::uint64_t frames = 0;  // 0: until interrupted
  int distinct_frames = 200;
  double spot_sigma_px = 0.9;
  double photons = 5000.0;
  double max_offset_px = 1.5;
  double read_noise_e = 3.0;
  double bias_adu = 100.0;
  double gain_e_per_adu = 1.0;
  std::uint64_t seed = 1;
  std::string truth_csv;
  std::string write_dark;
  int dark_frames = 100;
  double wait_subscriber_s = 10.0;
  std::string source_id = "slopecast-sim";
};

void fail(const std::string& why) {
  std::cerr << "slopecast sim: " << why << "\n";
  exit_code() = 2;
}

void run_sim(const SimOptions& o) {
  sim::SpotFieldSettings field;
  field.grid = core::LensletGrid{o.subapertures_x, o.subapertures_y, o.pitch_px, 0, 0};
  field.spot_sigma_px = o.spot_sigma_px;
  field.photons_per_spot = o.photons;
  field.max_offset_px = o.max_offset_px;
  sim::DetectorModel detector;
  detector.read_noise_e = o.read_noise_e;
  detector.bias_adu = o.bias_adu;
  detector.gain_e_per_adu = o.gain_e_per_adu;
  if (auto e = sim::validate(field); !e.empty()) return fail(e);
  if (auto e = sim::validate(detector); !e.empty()) return fail(e);
  const int width = o.subapertures_x * o.pitch_px, height = o.subapertures_y * o.pitch_px;

  if (!o.write_dark.empty()) {
    const auto dark = sim::make_mean_dark(detector, width, height, o.dark_frames, o.seed ^ 0xda4c);
    const io::FitsCard cards[] = {{"NCOMBINE", double(o.dark_frames), "dark exposures averaged"},
                                  {"BIAS", o.bias_adu, "[adu] simulated bias level"},
                                  {"RDNOISE", o.read_noise_e, "[e-] simulated read noise"}};
    if (auto e = io::write_fits_image(o.write_dark, width, height, dark, cards,
                                      "mean dark made by slopecast sim");
        !e.empty())
      return fail(e);
    std::cout << fmt::format("wrote {} x {} mean of {} dark frames to {}\n", width, height, o.dark_frames,
                             o.write_dark);
    return;
  }

  std::ofstream truth;
  if (!o.truth_csv.empty()) {
    truth.open(o.truth_csv);
    if (!truth) return fail("cannot write truth CSV '" + o.truth_csv + "'");
    truth << "frame_seq,subaperture,true_dx_px,true_dy_px\n";
  }
  const int distinct =
      static_cast<int>(o.frames > 0 ? std::min<std::uint64_t>(o.frames, o.distinct_frames) : o.distinct_frames);
  std::cout << fmt::format("rendering {} distinct {} x {} frames ({} x {} spots, sigma {} px, {} photons)...\n",
                           distinct, width, height, o.subapertures_x, o.subapertures_y, o.spot_sigma_px, o.photons)
            << std::flush;
  const sim::FrameBank bank = sim::make_frame_bank(field, detector, width, height, distinct, o.seed);

  zmq::context_t ctx(1);
  std::unique_ptr<client::FramePublisher> pub;
  try {
    pub = std::make_unique<client::FramePublisher>(ctx, o.frames_out);
  } catch (const zmq::error_t& e) {
    return fail(fmt::format("cannot bind {}: {}", o.frames_out, e.what()));
  }
  if (o.wait_subscriber_s > 0) {
    std::cout << "waiting for a subscriber on " << o.frames_out << "...\n" << std::flush;
    if (!pub->wait_for_subscriber(std::chrono::milliseconds(static_cast<long>(o.wait_subscriber_s * 1000))))
      return fail(fmt::format("no subscriber on {} within {} s", o.frames_out, o.wait_subscriber_s));
  }
  std::cout << fmt::format("publishing on {} at {} Hz{}\n", o.frames_out, o.rate_hz,
                           o.frames ? fmt::format(", {} frames", o.frames) : std::string(" until stopped"))
            << std::flush;

  using clock = std::chrono::steady_clock;
  const auto period = std::chrono::duration_cast<clock::duration>(std::chrono::duration<double>(1.0 / o.rate_hz));
  const auto start = clock::now();
  std::uint64_t sent = 0, dropped = 0;
  v1::FrameHeader header = client::make_frame_header(0, 0, width, height, v1::PIXEL_TYPE_U16);
  header.set_exposure_us(1e6 / o.rate_hz);
  header.set_source_id(o.source_id);
  for (std::uint64_t seq = 0; (o.frames == 0 || seq < o.frames) && !stop_requested(); ++seq) {
    std::this_thread::sleep_until(start + period * static_cast<long>(seq));
    const std::size_t k = seq % bank.frames.size();
    header.set_seq(seq);
    header.set_camera_time_ns(client::wall_clock_ns());
    const auto& frame = bank.frames[k];
    if (pub->publish(header, std::as_bytes(std::span(frame)))) ++sent;
    else ++dropped;
    if (truth.is_open()) {
      const auto& t = bank.truth[k];
      for (std::size_t i = 0; i < t.dx_px.size(); ++i)
        truth << fmt::format("{},{},{:.6f},{:.6f}\n", seq, i, t.dx_px[i], t.dy_px[i]);
    }
  }
  const double elapsed = std::chrono::duration<double>(clock::now() - start).count();
  std::cout << fmt::format("sent {} frames in {:.2f} s ({:.1f} Hz); {} dropped because a subscriber's queue was full\n", sent, elapsed,
                           elapsed > 0 ? sent / elapsed : 0.0, dropped);
}

}  // namespace

void add_sim_command(CLI::App& app) {
  auto o = std::make_shared<SimOptions>();
  auto* cmd = app.add_subcommand("sim", "Simulate a lenslet camera: publish frames of spots with known offsets");
  cmd->add_option("--frames-out", o->frames_out, "Endpoint to bind and publish frames on")->capture_default_str();
  cmd->add_option("--subapertures-x", o->subapertures_x, "Subapertures across")->capture_default_str()->check(CLI::Range(1, 1024));
  cmd->add_option("--subapertures-y", o->subapertures_y, "Subapertures down")->capture_default_str()->check(CLI::Range(1, 1024));
  cmd->add_option("--pitch-px", o->pitch_px, "Subaperture box side, px (the camera is subapertures x pitch)")
      ->capture_default_str()->check(CLI::Range(2, 256));
  cmd->add_option("--rate-hz", o->rate_hz, "Frame rate")->capture_default_str()->check(CLI::Range(0.1, 100000.0));
  cmd->add_option("--frames", o->frames, "Frames to send (0: until Ctrl-C)")->capture_default_str();
  cmd->add_option("--distinct-frames", o->distinct_frames,
                  "Distinct frames rendered up front and cycled (seq k shows frame k mod this)")
      ->capture_default_str()->check(CLI::Range(1, 100000));
  cmd->add_option("--spot-sigma-px", o->spot_sigma_px, "Spot rms width, px")->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--photons", o->photons, "Expected photo-electrons per spot")->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--max-offset-px", o->max_offset_px, "Offsets drawn uniformly from [-max, max] px, per axis")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--read-noise-e", o->read_noise_e, "Read noise, e- rms per pixel")->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--bias-adu", o->bias_adu, "Bias level, ADU")->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--gain-e-per-adu", o->gain_e_per_adu, "Detector gain, e- per ADU")->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--seed", o->seed, "Random seed (same seed, same frames)")->capture_default_str();
  cmd->add_option("--truth-csv", o->truth_csv,
                  "Write the true offsets of every published frame here (frame_seq,subaperture,true_dx_px,true_dy_px)");
  cmd->add_option("--write-dark", o->write_dark,
                  "Instead of publishing, write the mean of --dark-frames dark exposures to this FITS file and exit");
  cmd->add_option("--dark-frames", o->dark_frames, "Dark exposures averaged by --write-dark")
      ->capture_default_str()->check(CLI::Range(1, 100000));
  cmd->add_option("--wait-subscriber-s", o->wait_subscriber_s,
                  "Wait up to this long for a subscriber before the first frame (0: do not wait)")
      ->capture_default_str()->check(CLI::NonNegativeNumber);
  cmd->add_option("--source-id", o->source_id, "Text put in every frame header's source_id")->capture_default_str();
  cmd->callback([o] { run_sim(*o); });
}

}  // namespace slopecast::cli
