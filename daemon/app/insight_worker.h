// The daemon's insight thread: modal decomposition, r0 and seeing,
// per-slope noise, a shadow centroider and previews, worked out beside the
// measuring loop and published on [endpoints] insight_out
// (proto/slopecast/v1/insight.proto).
//
// DESIGN
// The loop thread hands each measured frame to offer() after its
// measurement has been published. offer() takes a free slot from a fixed
// pool (kSlots; sized once, reused), copies the slopes, fluxes, widths and
// flags into it -- and the pixels, when the shadow centroider runs or a
// preview is due -- and queues it. When no slot is free (the analysis is
// behind) the frame is skipped for insight and counted; the loop never
// waits for the analysis. The thread takes slots in order, updates the
// rolling windows (DifferentialMotion, modal coefficients, shadow
// differences), returns the slot, and publishes reports at report_rate_hz.
// A settings change (calibration, centroider) reaches the thread through
// reconfigure(); it rebuilds its fit, windows and shadow pipeline before the
// next slot.
#pragma once

#include <atomic>
#include <condition_variable>
#include <cstdint>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include <zmq.hpp>

#include "daemon/core/modal/modal_fit.h"
#include "daemon/core/modal/turbulence_statistics.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/daemon_config.h"
#include "slopecast/v1/insight.pb.h"
#include "slopecast/v1/measurement.pb.h"

namespace slopecast::app {

class InsightWorker {
 public:
  static constexpr int kSlots = 8;

  // socket: the bound PUB socket of insight_out (moved to the thread).
  InsightWorker(zmq::socket_t socket, const io::DaemonConfig& config, const core::Pipeline& live);
  ~InsightWorker();
  InsightWorker(const InsightWorker&) = delete;
  InsightWorker& operator=(const InsightWorker&) = delete;

  // From the loop thread, after the measurement went out. Never waits for
  // the analysis.
  void offer(const core::FrameMeasurement& m, const core::ImageView& image, std::uint64_t seq,
             const v1::Measurement& wire);
  // From the loop thread when the pipeline's settings change.
  void reconfigure(const core::Pipeline& live);
  // From the loop thread: run this shadow centroider from the next frame
  // (nullopt: none). Its statistics start afresh.
  void set_shadow(std::optional<core::CentroiderSettings> shadow);

  std::uint64_t frames_analysed() const { return analysed_.load(std::memory_order_relaxed); }
  std::uint64_t frames_skipped() const { return skipped_.load(std::memory_order_relaxed); }
  std::uint64_t shadow_frames() const { return shadow_frames_.load(std::memory_order_relaxed); }

 private:
  struct Slot {
    std::uint64_t seq = 0;
    std::vector<float> sx, sy, flux, background, fwhm_x, fwhm_y, var_x, var_y;
    std::vector<std::uint32_t> flags;
    bool has_pixels = false, preview = false;
    std::vector<std::byte> pixels;  // rows packed
    core::ImageView image{};        // shape of pixels (data re-pointed by the thread)
    std::string wire;               // the serialised Measurement (previews)
  };
  struct Geometry {
    core::PipelineSettings settings;
    std::vector<core::SubapertureBox> boxes;
  };

  void run();
  void rebuild(const Geometry& g);
  void rebuild_shadow();
  void analyse(Slot& s);
  void publish_reports(std::uint64_t seq);
  void publish_preview(const Slot& s);
  void send(const char* topic, const google::protobuf::Message& m);

  io::InsightSettings settings_;
  core::SlopeOptics optics_;
  std::optional<core::PupilSpec> pupil_config_;
  zmq::socket_t socket_;

  // Slots and the queue between the threads.
  std::vector<Slot> slots_;
  std::mutex mutex_;
  std::condition_variable ready_cv_;
  std::vector<int> free_, ready_;  // ready_ in arrival order
  std::optional<Geometry> pending_;
  std::optional<std::optional<core::CentroiderSettings>> pending_shadow_;
  std::atomic<bool> shadow_on_{false};  // read by offer(): copy the pixels
  bool stop_ = false;
  std::atomic<std::uint64_t> analysed_{0}, skipped_{0}, shadow_frames_{0};
  // Loop-thread state for previews.
  std::chrono::steady_clock::time_point next_preview_{};

  // Thread state.
  Geometry geometry_;
  double nm_per_px_ = 0;        // OPD across a subaperture per px of spot shift (0: no [optics])
  double subaperture_m_ = 0;    // a subaperture's side in the telescope pupil (0: unknown)
  std::string modes_refused_, r0_refused_;
  std::optional<core::ModalFit> fit_;
  std::unique_ptr<core::DifferentialMotion> window_;
  std::vector<double> coefficients_, coefficient_ring_;  // last fit; window x modes
  std::vector<double> zernike_variances_;                // Noll's <a_j^2> for D = r0, per fitted mode
  long coefficient_count_ = 0, coefficient_next_ = 0;
  std::uint64_t modes_seq_ = 0;
  std::vector<float> shadow_ring_;                       // window x n x 2 (dx, dy), NaN where either invalid
  long shadow_count_ = 0, shadow_next_ = 0;
  std::unique_ptr<core::Pipeline> shadow_;
  core::FrameMeasurement shadow_m_;
  Slot last_;  // for the noise model
  std::vector<double> ox_, oy_;
  std::vector<std::uint8_t> valid_;
  std::thread thread_;
};

}  // namespace slopecast::app
