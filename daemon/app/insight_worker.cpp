#include "daemon/app/insight_worker.h"

#include <algorithm>
#include <cmath>
#include <cstring>

#include <fmt/format.h>
#include <spdlog/spdlog.h>

#include "daemon/core/centroid/centroid_noise.h"
#include "daemon/core/frame/pixel_format.h"
#include "daemon/core/modal/zernike.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::app {

namespace {

// The pupil the fit works on: the configured one, or the layout's extent.
core::PupilSpec pupil_of(const std::optional<core::PupilSpec>& configured, const std::vector<core::SubapertureBox>& boxes) {
  if (configured) return *configured;
  int x0 = 1 << 30, y0 = 1 << 30, x1 = -(1 << 30), y1 = -(1 << 30);
  for (const auto& b : boxes) {
    x0 = std::min(x0, b.x0);
    y0 = std::min(y0, b.y0);
    x1 = std::max(x1, b.x0 + b.width);
    y1 = std::max(y1, b.y0 + b.height);
  }
  return {(x0 + x1) / 2.0, (y0 + y1) / 2.0, static_cast<double>(std::max(x1 - x0, y1 - y0)), 0.0};
}

}  // namespace

InsightWorker::InsightWorker(zmq::socket_t socket, const io::DaemonConfig& config, const core::Pipeline& live)
    : settings_(config.insight), optics_(config.optics), pupil_config_(config.pupil), socket_(std::move(socket)),
      slots_(kSlots) {
  for (int i = 0; i < kSlots; ++i) free_.push_back(i);
  const std::size_t frame_bytes = static_cast<std::size_t>(live.settings().camera.width_px) *
                                  live.settings().camera.height_px *
                                  core::bytes_per_pixel(live.settings().camera.format);
  for (Slot& s : slots_) {
    if (settings_.shadow || settings_.preview_rate_hz > 0) s.pixels.reserve(frame_bytes);
    s.wire.reserve(1 << 16);
  }
  pending_ = Geometry{live.settings(), live.boxes()};
  shadow_on_ = settings_.shadow;
  thread_ = std::thread([this] { run(); });
}

InsightWorker::~InsightWorker() {
  {
    std::lock_guard lock(mutex_);
    stop_ = true;
  }
  ready_cv_.notify_all();
  thread_.join();
}

void InsightWorker::reconfigure(const core::Pipeline& live) {
  std::lock_guard lock(mutex_);
  pending_ = Geometry{live.settings(), live.boxes()};
}

void InsightWorker::set_shadow(std::optional<core::CentroiderSettings> shadow) {
  shadow_on_ = shadow.has_value();
  std::lock_guard lock(mutex_);
  pending_shadow_ = std::move(shadow);
}

void InsightWorker::offer(const core::FrameMeasurement& m, const core::ImageView& image, std::uint64_t seq,
                          const v1::Measurement& wire) {
  int index = -1;
  {
    std::unique_lock lock(mutex_, std::try_to_lock);
    if (lock && !free_.empty()) {
      index = free_.back();
      free_.pop_back();
    }
  }
  if (index < 0) {
    skipped_.fetch_add(1, std::memory_order_relaxed);
    return;
  }
  Slot& s = slots_[index];
  s.seq = seq;
  s.sx.assign(m.slope_x_px.begin(), m.slope_x_px.end());
  s.sy.assign(m.slope_y_px.begin(), m.slope_y_px.end());
  s.flux.assign(m.flux_adu.begin(), m.flux_adu.end());
  s.background.assign(m.background_adu.begin(), m.background_adu.end());
  s.fwhm_x.assign(m.fwhm_x_px.begin(), m.fwhm_x_px.end());
  s.fwhm_y.assign(m.fwhm_y_px.begin(), m.fwhm_y_px.end());
  s.flags.assign(m.flags.begin(), m.flags.end());
  s.var_x.assign(m.slope_var_x_px2.begin(), m.slope_var_x_px2.end());
  s.var_y.assign(m.slope_var_y_px2.begin(), m.slope_var_y_px2.end());
  const auto now = std::chrono::steady_clock::now();
  s.preview = settings_.preview_rate_hz > 0 && now >= next_preview_;
  if (s.preview)
    next_preview_ = now + std::chrono::duration_cast<std::chrono::steady_clock::duration>(
                              std::chrono::duration<double>(1.0 / settings_.preview_rate_hz));
  s.has_pixels = shadow_on_.load(std::memory_order_relaxed) || s.preview;
  if (s.has_pixels) {
    const std::size_t row = static_cast<std::size_t>(image.width) * core::bytes_per_pixel(image.format);
    s.pixels.resize(row * image.height);
    for (int y = 0; y < image.height; ++y) std::memcpy(s.pixels.data() + y * row, image.row(y), row);
    s.image = {{}, image.width, image.height, row, image.format};
  }
  if (s.preview) wire.SerializeToString(&s.wire);
  {
    std::lock_guard lock(mutex_);
    ready_.push_back(index);
  }
  ready_cv_.notify_one();
}

void InsightWorker::rebuild(const Geometry& g) {
  geometry_ = g;
  const auto& boxes = g.boxes;
  const int n = static_cast<int>(boxes.size());
  auto opd = core::units_per_px(core::SlopeUnit::kNm, optics_);
  nm_per_px_ = std::holds_alternative<double>(opd) ? std::get<double>(opd) : 0.0;
  const core::PupilSpec pupil = pupil_of(pupil_config_, boxes);
  // Which subapertures enter the fit and the pairs: those of the valid
  // map that the pupil lights for at least half their area.
  std::vector<std::uint8_t> used = core::valid_from_pupil(boxes, pupil, 0.5);
  if (!g.settings.valid_map.empty())
    for (int i = 0; i < n; ++i) used[i] = used[i] && g.settings.valid_map[i];
  modes_refused_.clear();
  r0_refused_.clear();
  fit_.reset();
  if (nm_per_px_ <= 0) {
    modes_refused_ = "no OPD per px: set [optics] pixel_size_um, lenslet_focal_length_mm and lenslet_pitch_um";
  } else {
    auto made = core::ModalFit::make(boxes, used, pupil, settings_.zernike_max_noll);
    if (auto* e = std::get_if<std::string>(&made)) modes_refused_ = *e;
    else fit_ = std::move(std::get<core::ModalFit>(made));
  }
  subaperture_m_ = 0;
  if (settings_.telescope_diameter_m > 0 && pupil.diameter_px > 0 && !boxes.empty())
    subaperture_m_ = settings_.telescope_diameter_m * boxes[0].width / pupil.diameter_px;
  if (nm_per_px_ <= 0) r0_refused_ = modes_refused_;
  else if (subaperture_m_ <= 0) r0_refused_ = "no scale in the telescope: set [insight] telescope_diameter_m";
  else if (settings_.loop_closed)
    r0_refused_ = "the loop is closed ([insight] loop_closed): residual slopes do not measure the turbulence";
  // The window holds OPD across a subaperture when the optics are known
  // (angles for r0), plain px otherwise (temporal noise only).
  const double d = subaperture_m_ > 0 && nm_per_px_ > 0 ? subaperture_m_ : 1.0;
  window_ = std::make_unique<core::DifferentialMotion>(boxes, used, d, settings_.outer_scale_m,
                                                       settings_.window_frames);
  coefficients_.assign(std::max(0, settings_.zernike_max_noll - 1), 0.0);
  // Noll's expected variances (for D = r0) of the fitted modes, once.
  zernike_variances_.assign(coefficients_.size(), 0.0);
  if (settings_.telescope_diameter_m > 0)
    for (std::size_t k = 2; k < coefficients_.size(); ++k)
      zernike_variances_[k] =
          core::zernike_variance_coefficient(static_cast<int>(k) + 2, settings_.outer_scale_m / settings_.telescope_diameter_m);
  coefficient_ring_.assign(static_cast<std::size_t>(settings_.window_frames) * coefficients_.size(), 0.0);
  coefficient_count_ = coefficient_next_ = 0;
  modes_seq_ = 0;
  rebuild_shadow();
  ox_.assign(n, 0.0);
  oy_.assign(n, 0.0);
  valid_.assign(n, 0);
  last_ = Slot{};
}

void InsightWorker::rebuild_shadow() {
  const int n = static_cast<int>(geometry_.boxes.size());
  shadow_ring_.assign(static_cast<std::size_t>(settings_.window_frames) * n * 2, 0.0f);
  shadow_count_ = shadow_next_ = 0;
  shadow_.reset();
  if (!settings_.shadow) return;
  core::PipelineSettings s = geometry_.settings;
  s.centroider = settings_.shadow_centroider;
  if (auto e = core::validate(s); !e.empty()) {  // a live grid change may not suit it any more
    spdlog::warn("insight: shadow centroider {} stopped: {}", core::describe(s.centroider), e);
    settings_.shadow = false;
    shadow_on_ = false;
    return;
  }
  shadow_ = std::make_unique<core::Pipeline>(std::move(s));
  shadow_m_ = shadow_->make_measurement();
}

void InsightWorker::analyse(Slot& s) {
  const int n = static_cast<int>(geometry_.boxes.size());
  if (static_cast<int>(s.sx.size()) != n) return;  // measured under other settings
  const double scale = nm_per_px_ > 0 && subaperture_m_ > 0 ? nm_per_px_ * 1e-9 : 1.0;
  bool all_used_valid = true;
  for (int i = 0; i < n; ++i) {
    valid_[i] = s.flags[i] == 0;
    ox_[i] = s.sx[i] * scale;
    oy_[i] = s.sy[i] * scale;
    if (fit_ && fit_->used()[i] && !valid_[i]) all_used_valid = false;
  }
  window_->add(ox_, oy_, valid_);
  if (fit_ && all_used_valid) {
    fit_->fit(s.sx, s.sy, nm_per_px_, coefficients_);
    std::copy(coefficients_.begin(), coefficients_.end(),
              coefficient_ring_.begin() + static_cast<long>(coefficient_next_ * coefficients_.size()));
    coefficient_next_ = (coefficient_next_ + 1) % settings_.window_frames;
    coefficient_count_ = std::min<long>(coefficient_count_ + 1, settings_.window_frames);
    modes_seq_ = s.seq;
  }
  if (shadow_ && s.has_pixels) {
    core::ImageView image = s.image;
    image.data = std::span<const std::byte>(s.pixels.data(), s.pixels.size());
    shadow_->measure(image, shadow_m_);
    float* ring = shadow_ring_.data() + static_cast<std::size_t>(shadow_next_) * n * 2;
    for (int i = 0; i < n; ++i) {
      const bool both = valid_[i] && shadow_m_.flags[i] == 0;
      ring[2 * i] = both ? shadow_m_.slope_x_px[i] - s.sx[i] : NAN;
      ring[2 * i + 1] = both ? shadow_m_.slope_y_px[i] - s.sy[i] : NAN;
    }
    shadow_next_ = (shadow_next_ + 1) % settings_.window_frames;
    shadow_count_ = std::min<long>(shadow_count_ + 1, settings_.window_frames);
    shadow_frames_.fetch_add(1, std::memory_order_relaxed);
  }
  if (s.preview) publish_preview(s);
  // Keep the last frame's fluxes and widths for the noise model.
  last_.seq = s.seq;
  last_.flux = s.flux;
  last_.background = s.background;
  last_.fwhm_x = s.fwhm_x;
  last_.fwhm_y = s.fwhm_y;
  last_.flags = s.flags;
  last_.var_x = s.var_x;
  last_.var_y = s.var_y;
  analysed_.fetch_add(1, std::memory_order_relaxed);
}

void InsightWorker::send(const char* topic, const google::protobuf::Message& m) {
  const std::string bytes = m.SerializeAsString();
  (void)socket_.send(zmq::buffer(std::string_view(topic)), zmq::send_flags::sndmore | zmq::send_flags::dontwait);
  (void)socket_.send(zmq::buffer(bytes), zmq::send_flags::dontwait);
}

void InsightWorker::publish_reports(std::uint64_t seq) {
  const int n = static_cast<int>(geometry_.boxes.size());
  // Modes.
  {
    v1::ModesReport r;
    r.set_frame_seq(modes_seq_);
    if (!fit_) {
      r.set_refused(modes_refused_);
    } else if (coefficient_count_ == 0) {
      r.set_refused("no frame yet with every subaperture of the valid map valid");
    } else {
      for (double a : coefficients_) r.add_coefficients_nm(a);
      r.set_tip_nm(coefficients_[0]);
      r.set_tilt_nm(coefficients_.size() > 1 ? coefficients_[1] : 0.0);
      r.set_wavefront_rms_nm(core::wavefront_rms(coefficients_, 2));
      r.set_wavefront_rms_no_tilt_nm(core::wavefront_rms(coefficients_, 4));
      if (settings_.strehl_wavelength_nm > 0) {
        r.set_strehl_wavelength_nm(settings_.strehl_wavelength_nm);
        r.set_strehl(core::strehl_estimate(r.wavefront_rms_no_tilt_nm(), settings_.strehl_wavelength_nm));
      }
      int used = 0;
      for (auto u : fit_->used()) used += u;
      r.set_subapertures_used(static_cast<std::uint32_t>(used));
    }
    send("modes", r);
  }
  // Turbulence.
  {
    v1::TurbulenceReport r;
    r.set_frame_seq(seq);
    r.set_outer_scale_m(settings_.outer_scale_m);
    r.set_window_frames(static_cast<std::uint32_t>(window_->frames()));
    if (!r0_refused_.empty()) {
      r.set_refused(r0_refused_);
    } else {
      const auto e = window_->estimate(500e-9);
      r.set_pairs(static_cast<std::uint32_t>(e.pairs));
      if (!e.ok) {
        r.set_refused(e.refused);
      } else {
        r.set_r0_500nm_m(e.r0_m);
        r.set_r0_longitudinal_500nm_m(e.r0_longitudinal_m);
        r.set_r0_transverse_500nm_m(e.r0_transverse_m);
        r.set_seeing_500nm_arcsec(core::seeing_arcsec(500e-9, e.r0_m));
        if (settings_.sensing_wavelength_nm > 0) {
          const double lambda = settings_.sensing_wavelength_nm * 1e-9;
          r.set_sensing_wavelength_nm(settings_.sensing_wavelength_nm);
          r.set_r0_sensing_m(core::r0_at(e.r0_m, 500e-9, lambda));
          r.set_seeing_sensing_arcsec(core::seeing_arcsec(lambda, r.r0_sensing_m()));
        }
      }
      // From the Zernike variances, j = 4 ... (tip/tilt carry shake and
      // the outer scale's strongest effect).
      const int modes = static_cast<int>(coefficients_.size());
      if (!fit_ || modes < 3) {
        r.set_zernike_refused(fit_ ? "fewer than 4 modes fitted" : modes_refused_);
      } else if (coefficient_count_ < 50) {
        r.set_zernike_refused(fmt::format("{} fitted frames in the window, fewer than 50", coefficient_count_));
      } else {
        const double D = settings_.telescope_diameter_m, to_rad = 2 * M_PI / 500.0;  // nm -> rad at 500 nm
        double measured = 0, expected = 0;
        for (int k = 2; k < modes; ++k) {
          double sum = 0, sum2 = 0;
          for (long f = 0; f < coefficient_count_; ++f) {
            const double a = coefficient_ring_[f * modes + k];
            sum += a;
            sum2 += a * a;
          }
          const double var = (sum2 - sum * sum / coefficient_count_) / (coefficient_count_ - 1);
          measured += var * to_rad * to_rad;
          expected += zernike_variances_[k];
        }
        if (measured > 0) r.set_r0_zernike_500nm_m(D * std::pow(expected / measured, 3.0 / 5.0));
        else r.set_zernike_refused("the modes did not vary over the window");
      }
    }
    send("turbulence", r);
  }
  // Noise.
  {
    v1::NoiseReport r;
    r.set_frame_seq(last_.seq);
    // The model's variances are the pipeline's own (the [camera] noise
    // figures; published with every measurement too), from the last frame.
    const auto& method = geometry_.settings.centroider;
    const bool modelled = geometry_.settings.gain_e_per_adu > 0 && core::has_noise_model(method.kind);
    r.set_model(modelled ? std::string(core::centroider_name(method.kind)) : std::string());
    std::vector<double> vx(n), vy(n);
    window_->temporal_variance(vx, vy);
    const double d = subaperture_m_ > 0 && nm_per_px_ > 0 ? subaperture_m_ : 1.0;
    const double to_px2 = subaperture_m_ > 0 && nm_per_px_ > 0 ? std::pow(d / (nm_per_px_ * 1e-9), 2) : 1.0;
    const bool have_model = static_cast<int>(last_.var_x.size()) == n;
    for (int i = 0; i < n; ++i) {
      r.add_model_variance_x_px2(have_model ? last_.var_x[i] : 0.0f);
      r.add_model_variance_y_px2(have_model ? last_.var_y[i] : 0.0f);
      r.add_temporal_variance_x_px2(static_cast<float>(vx[i] * to_px2));
      r.add_temporal_variance_y_px2(static_cast<float>(vy[i] * to_px2));
    }
    r.set_window_frames(static_cast<std::uint32_t>(window_->frames()));
    send("noise", r);
  }
  // Shadow.
  if (shadow_) {
    v1::ShadowReport r;
    r.set_frame_seq(seq);
    r.set_centroider(core::describe(settings_.shadow_centroider));
    r.set_window_frames(static_cast<std::uint32_t>(shadow_count_));
    double all2 = 0;
    long all = 0;
    for (int i = 0; i < n; ++i) {
      double sx = 0, sy = 0, sx2 = 0, sy2 = 0;
      long m = 0;
      for (long f = 0; f < shadow_count_; ++f) {
        const float* ring = shadow_ring_.data() + static_cast<std::size_t>(f) * n * 2;
        if (std::isnan(ring[2 * i])) continue;
        sx += ring[2 * i];
        sy += ring[2 * i + 1];
        sx2 += ring[2 * i] * ring[2 * i];
        sy2 += ring[2 * i + 1] * ring[2 * i + 1];
        ++m;
      }
      r.add_mean_dx_px(m ? static_cast<float>(sx / m) : 0.0f);
      r.add_mean_dy_px(m ? static_cast<float>(sy / m) : 0.0f);
      r.add_rms_dx_px(m ? static_cast<float>(std::sqrt(sx2 / m)) : 0.0f);
      r.add_rms_dy_px(m ? static_cast<float>(std::sqrt(sy2 / m)) : 0.0f);
      all2 += sx2 + sy2;
      all += 2 * m;
    }
    r.set_overall_rms_px(all ? std::sqrt(all2 / all) : 0.0);
    send("shadow", r);
  }
}

void InsightWorker::publish_preview(const Slot& s) {
  const core::ImageView& im = s.image;
  const int side = std::max(im.width, im.height);
  const int bin = std::max(1, (side + settings_.preview_max_side_px - 1) / settings_.preview_max_side_px);
  const int w = im.width / bin, h = im.height / bin;
  v1::Preview p;
  p.set_frame_seq(s.seq);
  p.set_width_px(static_cast<std::uint32_t>(w));
  p.set_height_px(static_cast<std::uint32_t>(h));
  p.set_binning(static_cast<std::uint32_t>(bin));
  p.set_camera_pixel_type(io::to_wire(im.format));
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) {
      double sum = 0;
      for (int by = 0; by < bin; ++by) {
        const std::byte* row = s.pixels.data() + static_cast<std::size_t>(y * bin + by) * im.row_stride_bytes;
        for (int bx = 0; bx < bin; ++bx) sum += core::load_pixel_as_double(im.format, row, x * bin + bx);
      }
      p.add_pixels(static_cast<float>(sum / (bin * bin)));
    }
  p.set_measurement(s.wire);
  for (const auto& b : geometry_.boxes) {
    p.add_box_x0(b.x0);
    p.add_box_y0(b.y0);
    p.add_box_width(b.width);
    p.add_box_height(b.height);
    p.add_ref_x(static_cast<float>(b.ref_x));
    p.add_ref_y(static_cast<float>(b.ref_y));
  }
  send("preview", p);
}

void InsightWorker::run() {
  using clock = std::chrono::steady_clock;
  const auto period = std::chrono::duration_cast<clock::duration>(std::chrono::duration<double>(1.0 / settings_.report_rate_hz));
  auto next_report = clock::now() + period;
  std::uint64_t last_seq = 0;
  for (;;) {
    int index = -1;
    std::optional<Geometry> geometry;
    std::optional<std::optional<core::CentroiderSettings>> shadow;
    {
      std::unique_lock lock(mutex_);
      ready_cv_.wait_until(lock, next_report,
                           [&] { return stop_ || !ready_.empty() || pending_ || pending_shadow_; });
      if (stop_) return;
      if (pending_) {
        geometry = std::move(pending_);
        pending_.reset();
      }
      if (pending_shadow_) {
        shadow = std::move(pending_shadow_);
        pending_shadow_.reset();
      }
      if (!ready_.empty()) {
        index = ready_.front();
        ready_.erase(ready_.begin());
      }
    }
    if (shadow) {
      settings_.shadow = shadow->has_value();
      if (*shadow) settings_.shadow_centroider = **shadow;
    }
    if (geometry) rebuild(*geometry);
    else if (shadow && window_) rebuild_shadow();
    if (index >= 0) {
      try {
        analyse(slots_[index]);
      } catch (const std::exception& e) {
        spdlog::error("insight: frame seq {} not analysed: {}", slots_[index].seq, e.what());
      }
      last_seq = slots_[index].seq;
      std::lock_guard lock(mutex_);
      free_.push_back(index);
    }
    if (clock::now() >= next_report) {
      next_report += period;
      if (next_report < clock::now()) next_report = clock::now() + period;
      if (window_) publish_reports(last_seq);
    }
  }
}

}  // namespace slopecast::app
