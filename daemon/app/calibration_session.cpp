#include "daemon/app/calibration_session.h"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

#include "daemon/core/calibration/bad_pixels.h"
#include "daemon/core/calibration/flat_field.h"
#include "daemon/core/calibration/valid_map.h"

namespace slopecast::app {

namespace {

constexpr std::uint32_t kMaxFrames = 100000;

std::string_view state_name(v1::AcquisitionState s) {
  switch (s) {
    case v1::ACQUISITION_STATE_IDLE: return "idle";
    case v1::ACQUISITION_STATE_RUNNING: return "running";
    case v1::ACQUISITION_STATE_DONE: return "done";
    case v1::ACQUISITION_STATE_FAILED: return "failed";
    case v1::ACQUISITION_STATE_CANCELLED: return "cancelled";
    default: return "?";
  }
}

}  // namespace

std::string_view acquisition_kind_name(v1::AcquisitionKind k) {
  switch (k) {
    case v1::ACQUISITION_KIND_DARK: return "dark";
    case v1::ACQUISITION_KIND_REFERENCE_SLOPES: return "reference_slopes";
    case v1::ACQUISITION_KIND_VALID_MAP: return "valid_map";
    case v1::ACQUISITION_KIND_FLAT: return "flat";
    case v1::ACQUISITION_KIND_REGISTRATION: return "registration";
    case v1::ACQUISITION_KIND_SKY: return "sky";
    default: return "unspecified";
  }
}

std::string check_set_name(const std::string& name) {
  if (name.empty() || name.size() > 100 || name[0] == '.' ||
      !std::all_of(name.begin(), name.end(), [](char c) {
        return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '.' || c == '_' ||
               c == '-';
      }))
    return fmt::format("'{}' is not a set name: use 1..100 letters, digits, '.', '_' or '-', not starting with '.' "
                       "(sets live in the daemon's calibration_dir)",
                       name);
  return {};
}

CalibrationSession::CalibrationSession(std::filesystem::path dir, std::string layout,
                                       std::optional<core::LatticeFit> lattice,
                                       std::map<std::string, io::Provenance> made)
    : dir_(std::move(dir)), layout_(std::move(layout)), lattice_(lattice), made_(std::move(made)) {}

std::string CalibrationSession::start(const v1::StartAcquisitionRequest& req, const core::PipelineSettings& s,
                                      std::uint32_t generation) {
  if (running())
    return fmt::format("a {} acquisition is running ({} of {} frames); cancel it first",
                       acquisition_kind_name(req_.kind()), frames_done_, req_.frames());
  if (req.frames() < 1 || req.frames() > kMaxFrames)
    return fmt::format("frames must be 1..{}, got {}", kMaxFrames, req.frames());
  switch (req.kind()) {
    case v1::ACQUISITION_KIND_DARK:
      if (req.bad_pixels() && req.frames() < 2)
        return "a bad-pixel map needs at least 2 frames (it judges each pixel's spread too)";
      if (req.bad_pixel_sigma() != 0.0)
        if (auto e = core::validate(core::BadPixelSettings{req.bad_pixel_sigma()}); !e.empty()) return e;
      break;
    case v1::ACQUISITION_KIND_VALID_MAP:
      if (req.flux_fraction() != 0.0)
        if (auto e = core::validate_flux_fraction(req.flux_fraction()); !e.empty()) return e;
      break;
    case v1::ACQUISITION_KIND_REGISTRATION:
      if (req.box_px() != 0)
        if (auto e = core::validate(core::RegistrationSettings{static_cast<int>(req.box_px())}); !e.empty()) return e;
      break;
    case v1::ACQUISITION_KIND_REFERENCE_SLOPES:
    case v1::ACQUISITION_KIND_FLAT:
    case v1::ACQUISITION_KIND_SKY:
      break;
    default:
      return "choose an acquisition kind: dark, sky, reference_slopes, valid_map, flat or registration";
  }
  req_ = req;
  frames_done_ = 0;
  generation_ = generation;
  exposure_sum_us_ = 0.0;
  message_.clear();
  frames_.reset();
  slopes_.reset();
  if (req.kind() == v1::ACQUISITION_KIND_REFERENCE_SLOPES || req.kind() == v1::ACQUISITION_KIND_VALID_MAP)
    slopes_.emplace(s.grid.count());
  else
    frames_.emplace(s.camera.width_px, s.camera.height_px);
  state_ = v1::ACQUISITION_STATE_RUNNING;
  return {};
}

bool CalibrationSession::feed(const core::ImageView& image, const core::FrameMeasurement& measured,
                              double exposure_us, std::uint32_t generation) {
  if (!running()) return false;
  if (generation != generation_) {
    state_ = v1::ACQUISITION_STATE_FAILED;
    message_ = "the settings changed during the acquisition (a centroider switch or a loaded calibration); "
               "nothing was applied, start it again";
    frames_.reset();
    slopes_.reset();
    return false;
  }
  if (frames_) frames_->add(image);
  if (slopes_) slopes_->add(measured);
  exposure_sum_us_ += exposure_us;
  ++frames_done_;
  return frames_done_ >= req_.frames();
}

bool CalibrationSession::cancel() {
  if (!running()) return false;
  state_ = v1::ACQUISITION_STATE_CANCELLED;
  message_ = fmt::format("cancelled after {} of {} frames; nothing was applied", frames_done_, req_.frames());
  frames_.reset();
  slopes_.reset();
  return true;
}

std::optional<core::PipelineSettings> CalibrationSession::finish(const core::PipelineSettings& in_force) {
  core::PipelineSettings next = in_force;
  const int w = in_force.camera.width_px, h = in_force.camera.height_px;
  const io::Provenance made{io::utc_now_iso(), static_cast<long>(frames_done_),
                            frames_done_ ? exposure_sum_us_ / frames_done_ * 1e-6 : 0.0,
                            req_.command().empty() ? std::string("a control request") : req_.command()};
  std::string failure;
  std::map<std::string, io::Provenance> products;
  std::optional<core::LatticeFit> lattice = lattice_;
  std::string layout = layout_;
  const auto boxes = in_force.layout.empty() ? core::regular_layout(in_force.grid) : in_force.layout;
  switch (req_.kind()) {
    case v1::ACQUISITION_KIND_DARK: {
      next.dark_adu = frames_->mean();
      products["dark"] = made;
      message_ = fmt::format("dark from {} frames applied", frames_done_);
      if (req_.bad_pixels()) {
        const core::BadPixelSettings bp{req_.bad_pixel_sigma() > 0.0 ? req_.bad_pixel_sigma() : 5.0};
        next.bad_pixels = core::bad_pixel_map(next.dark_adu, frames_->stddev(), bp);
        const auto bad = std::count_if(next.bad_pixels.begin(), next.bad_pixels.end(), [](auto v) { return v != 0; });
        products["bad_pixels"] = made;
        message_ += fmt::format("; {} bad pixel(s) at {} sigma, replaced by their neighbours' mean", bad, bp.sigma);
      }
      break;
    }
    case v1::ACQUISITION_KIND_SKY: {
      next.sky_adu = frames_->mean();
      if (!in_force.dark_adu.empty())
        for (std::size_t k = 0; k < next.sky_adu.size(); ++k) next.sky_adu[k] -= in_force.dark_adu[k];
      products["sky"] = made;
      message_ = fmt::format("sky frame from {} frames applied{}", frames_done_,
                             in_force.dark_adu.empty() ? " (no dark in force: the bias is in the sky frame)" : "");
      break;
    }
    case v1::ACQUISITION_KIND_REFERENCE_SLOPES: {
      const auto r = slopes_->result();
      const auto n = static_cast<std::size_t>(in_force.grid.count());
      if (next.reference_slope_x_px.empty()) next.reference_slope_x_px.assign(n, 0.0f), next.reference_slope_y_px.assign(n, 0.0f);
      int always = 0;
      for (std::size_t i = 0; i < n; ++i) {
        if (r.valid_frames[i] == 0) continue;
        next.reference_slope_x_px[i] += r.slope_x_px[i];
        next.reference_slope_y_px[i] += r.slope_y_px[i];
        always += r.valid_frames[i] == static_cast<int>(frames_done_);
      }
      products["reference_slopes"] = made;
      message_ = fmt::format(
          "reference slopes from {} frames applied: {} subapertures valid in every frame, {} in fewer than half, "
          "{} never (theirs left unchanged)",
          frames_done_, always, r.seldom_valid, r.never_valid);
      break;
    }
    case v1::ACQUISITION_KIND_VALID_MAP: {
      const double f = req_.flux_fraction() > 0.0 ? req_.flux_fraction() : 0.5;
      next.valid_map = core::valid_from_flux(slopes_->result().mean_flux_adu, f);
      const auto in = std::count(next.valid_map.begin(), next.valid_map.end(), 1);
      if (in == 0) failure = "no subaperture had light: is the source on?";
      products["valid_map"] = made;
      message_ = fmt::format("valid map from {} frames applied: {} of {} subapertures at >= {} of the median flux", frames_done_,
                             in, next.valid_map.size(), f);
      break;
    }
    case v1::ACQUISITION_KIND_FLAT: {
      auto flat = core::normalised_flat(frames_->mean(), in_force.dark_adu, w, h, boxes, in_force.valid_map,
                                        in_force.bad_pixels);
      if (auto* e = std::get_if<std::string>(&flat)) {
        failure = *e;
        break;
      }
      next.flat = std::move(std::get<std::vector<float>>(flat));
      products["flat"] = made;
      message_ = fmt::format("flat from {} frames applied{}", frames_done_,
                             in_force.dark_adu.empty() ? " (no dark in force: the bias is in the flat)" : "");
      break;
    }
    case v1::ACQUISITION_KIND_REGISTRATION: {
      std::vector<float> image = frames_->mean();
      if (!in_force.dark_adu.empty())
        for (std::size_t k = 0; k < image.size(); ++k) image[k] -= in_force.dark_adu[k];
      core::RegistrationSettings rs;
      rs.box_px = static_cast<int>(req_.box_px());
      auto reg = core::register_lattice(image, w, h, rs);
      if (auto* e = std::get_if<std::string>(&reg)) {
        failure = "registration: " + *e;
        break;
      }
      const core::Registration& r = std::get<core::Registration>(reg);
      next.grid = r.grid;
      next.layout = r.layout;
      next.valid_map = r.valid_map;
      next.reference_slope_x_px.clear();
      next.reference_slope_y_px.clear();
      lattice = r.fit;
      layout = "registered lattice";
      products["layout"] = made;
      products["valid_map"] = made;
      const auto in = std::count(r.valid_map.begin(), r.valid_map.end(), 1);
      message_ = fmt::format(
          "registration from {} frames applied: pitch {:.4f} px, rotation {:.4f} deg, origin ({:.3f}, {:.3f}) px, "
          "fit residual {:.4f} px rms over {} of {} spots; {} x {} subapertures of {} px, {} in the valid map; "
          "reference slopes cleared",
          frames_done_, r.fit.pitch_px, r.fit.rotation_deg, r.fit.origin_x_px, r.fit.origin_y_px,
          r.fit.residual_rms_px, r.fit.spots_used, r.fit.spots_found, r.grid.n_subap_x, r.grid.n_subap_y,
          r.grid.pitch_px, in);
      break;
    }
    default:
      failure = "unknown acquisition kind";
  }
  frames_.reset();
  slopes_.reset();
  if (failure.empty())
    if (auto e = core::validate(next); !e.empty()) failure = "the result does not fit the settings in force: " + e;
  if (!failure.empty()) {
    state_ = v1::ACQUISITION_STATE_FAILED;
    message_ = failure + "; nothing was applied";
    return std::nullopt;
  }
  state_ = v1::ACQUISITION_STATE_DONE;
  for (auto& [k, v] : products) made_[k] = v;
  if (req_.kind() == v1::ACQUISITION_KIND_REGISTRATION) made_.erase("reference_slopes");
  lattice_ = lattice;
  layout_ = layout;
  return next;
}

std::string CalibrationSession::save(const std::string& name, const core::PipelineSettings& in_force,
                                     std::filesystem::path& written) {
  if (auto e = check_set_name(name); !e.empty()) return e;
  std::error_code ec;
  std::filesystem::create_directories(dir_, ec);
  if (ec) return fmt::format("cannot create calibration_dir '{}': {}", dir_.string(), ec.message());
  io::CalibrationSet set = io::calibration_of(in_force);
  set.lattice = lattice_;
  set.made = made_;
  if (!set.made.count("layout")) set.made["layout"] = io::Provenance{io::utc_now_iso(), 0, 0.0, layout_};
  written = dir_ / name;
  return io::save_calibration_set(set, written);
}

std::variant<core::PipelineSettings, std::string> CalibrationSession::load(const std::string& name,
                                                                          const core::PipelineSettings& in_force,
                                                                          std::filesystem::path& read) {
  if (auto e = check_set_name(name); !e.empty()) return e;
  read = dir_ / name;
  auto loaded = io::load_calibration_set(read, in_force.camera);
  if (auto* e = std::get_if<std::string>(&loaded)) return *e;
  const io::CalibrationSet& set = std::get<io::CalibrationSet>(loaded);
  core::PipelineSettings next = in_force;
  if (auto e = io::apply_calibration(set, next); !e.empty()) return e;
  made_ = set.made;
  lattice_ = set.lattice;
  layout_ = "set " + read.string();
  return next;
}

void CalibrationSession::describe(const core::PipelineSettings& s, v1::CalibrationReply& out) const {
  auto* a = out.mutable_acquisition();
  a->set_kind(req_.kind());
  a->set_kind_name(std::string(acquisition_kind_name(req_.kind())));
  a->set_state(state_);
  a->set_state_name(std::string(state_name(state_)));
  a->set_frames_done(frames_done_);
  a->set_frames_wanted(req_.frames());
  a->set_message(message_);
  out.set_n_subap_x(static_cast<std::uint32_t>(s.grid.n_subap_x));
  out.set_n_subap_y(static_cast<std::uint32_t>(s.grid.n_subap_y));
  out.set_box_px(static_cast<std::uint32_t>(s.grid.pitch_px));
  out.set_layout(layout_);
  out.set_subapertures_in_map(static_cast<std::uint32_t>(
      s.valid_map.empty() ? s.grid.count() : std::count(s.valid_map.begin(), s.valid_map.end(), 1)));
  out.set_reference_slopes(!s.reference_slope_x_px.empty());
  out.set_dark(!s.dark_adu.empty());
  out.set_flat(!s.flat.empty());
  out.set_sky(!s.sky_adu.empty());
  out.set_bad_pixels(static_cast<std::uint32_t>(
      std::count_if(s.bad_pixels.begin(), s.bad_pixels.end(), [](auto v) { return v != 0; })));
  if (lattice_) {
    auto* l = out.mutable_lattice();
    l->set_pitch_px(lattice_->pitch_px);
    l->set_rotation_deg(lattice_->rotation_deg);
    l->set_origin_x_px(lattice_->origin_x_px);
    l->set_origin_y_px(lattice_->origin_y_px);
    l->set_residual_rms_px(lattice_->residual_rms_px);
    l->set_spots_found(static_cast<std::uint32_t>(lattice_->spots_found));
    l->set_spots_used(static_cast<std::uint32_t>(lattice_->spots_used));
  }
}

}  // namespace slopecast::app
