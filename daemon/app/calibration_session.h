// Live calibration in slopecastd: acquisitions that average the next N
// frames (or their measurements) and then make and apply a product, and
// saving/loading calibration sets by name.
//
// The loop thread owns the session. start() allocates the stack it needs
// (checked against the settings in force); feed() runs once per measured
// frame without allocating; when it reports the stack full, finish() makes
// the product (core/calibration, core/geometry/registration) and returns
// the settings to build the next pipeline from. An acquisition is tied to
// the settings generation it started under: if the settings change
// meanwhile (a centroider switch, a loaded set), it fails rather than mix
// frames measured two ways.
#pragma once

#include <filesystem>
#include <map>
#include <optional>
#include <string>
#include <variant>

#include "daemon/core/calibration/frame_average.h"
#include "daemon/core/calibration/slope_average.h"
#include "daemon/core/geometry/registration.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/calibration_set.h"
#include "slopecast/v1/control.pb.h"

namespace slopecast::app {

class CalibrationSession {
 public:
  // calibration_dir: where save/load names live. layout: how the starting
  // layout came about, for replies ("regular grid", "table from ...", ...).
  CalibrationSession(std::filesystem::path calibration_dir, std::string layout, std::optional<core::LatticeFit> lattice,
                     std::map<std::string, io::Provenance> made);

  // Empty when started; otherwise why not (nothing changes).
  std::string start(const v1::StartAcquisitionRequest& req, const core::PipelineSettings& in_force,
                    std::uint32_t generation);
  bool running() const { return state_ == v1::ACQUISITION_STATE_RUNNING; }
  // One measured frame. True when the acquisition has all its frames and
  // finish() should run. Allocation-free.
  bool feed(const core::ImageView& image, const core::FrameMeasurement& measured, double exposure_us,
            std::uint32_t generation);
  // Makes the product: the settings to apply, or nullopt when it failed
  // (the reason is in the progress message). The stacks are released.
  std::optional<core::PipelineSettings> finish(const core::PipelineSettings& in_force);
  // Stops a running acquisition; false when none runs.
  bool cancel();

  // Save the calibration in force as set `name`; empty or why not.
  std::string save(const std::string& name, const core::PipelineSettings& in_force, std::filesystem::path& written);
  // Load set `name` into a copy of in_force: the settings, or why not.
  std::variant<core::PipelineSettings, std::string> load(const std::string& name,
                                                         const core::PipelineSettings& in_force,
                                                         std::filesystem::path& read);

  // The calibration in force and the last acquisition.
  void describe(const core::PipelineSettings& in_force, v1::CalibrationReply& out) const;

 private:
  std::filesystem::path dir_;
  std::string layout_;
  std::optional<core::LatticeFit> lattice_;
  std::map<std::string, io::Provenance> made_;

  v1::StartAcquisitionRequest req_;
  v1::AcquisitionState state_ = v1::ACQUISITION_STATE_IDLE;
  std::uint32_t frames_done_ = 0;
  std::uint32_t generation_ = 0;
  double exposure_sum_us_ = 0.0;
  std::string message_;
  std::optional<core::FrameAverager> frames_;
  std::optional<core::SlopeAverager> slopes_;
};

// A set name live requests may use: letters, digits, '.', '_', '-', not
// starting with '.', at most 100 characters (no path can be smuggled in).
std::string check_set_name(const std::string& name);

std::string_view acquisition_kind_name(v1::AcquisitionKind k);

}  // namespace slopecast::app
