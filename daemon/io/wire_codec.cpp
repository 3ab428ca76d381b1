#include "daemon/io/wire_codec.h"

#include <algorithm>

namespace slopecast::io {

v1::PixelType to_wire(core::PixelFormat f) {
  switch (f) {
    case core::PixelFormat::kU8: return v1::PIXEL_TYPE_U8;
    case core::PixelFormat::kU16: return v1::PIXEL_TYPE_U16;
    case core::PixelFormat::kU32: return v1::PIXEL_TYPE_U32;
    case core::PixelFormat::kF32: return v1::PIXEL_TYPE_F32;
  }
  return v1::PIXEL_TYPE_UNSPECIFIED;
}

v1::Centroider to_wire(core::CentroiderKind k) {
  switch (k) {
    case core::CentroiderKind::kCog: return v1::CENTROIDER_COG;
    case core::CentroiderKind::kThresholded: return v1::CENTROIDER_TCOG;
    case core::CentroiderKind::kWeighted: return v1::CENTROIDER_WCOG;
    case core::CentroiderKind::kBrightest: return v1::CENTROIDER_BRIGHTEST;
    case core::CentroiderKind::kCorrelation: return v1::CENTROIDER_CORRELATION;
    case core::CentroiderKind::kQuadCell: return v1::CENTROIDER_QUAD_CELL;
    case core::CentroiderKind::kGaussianFit: return v1::CENTROIDER_GAUSSIAN_FIT;
  }
  return v1::CENTROIDER_UNSPECIFIED;
}

v1::SlopeUnit to_wire(core::SlopeUnit u) {
  switch (u) {
    case core::SlopeUnit::kPx: return v1::SLOPE_UNIT_PX;
    case core::SlopeUnit::kRad: return v1::SLOPE_UNIT_RAD;
    case core::SlopeUnit::kNm: return v1::SLOPE_UNIT_NM;
    case core::SlopeUnit::kArcsec: return v1::SLOPE_UNIT_ARCSEC;
  }
  return v1::SLOPE_UNIT_UNSPECIFIED;
}

std::optional<core::PixelFormat> from_wire(int code) {
  switch (code) {
    case v1::PIXEL_TYPE_U8: return core::PixelFormat::kU8;
    case v1::PIXEL_TYPE_U16: return core::PixelFormat::kU16;
    case v1::PIXEL_TYPE_U32: return core::PixelFormat::kU32;
    case v1::PIXEL_TYPE_F32: return core::PixelFormat::kF32;
    default: return std::nullopt;
  }
}

std::optional<core::FrameFacts> decode_frame_header(std::span<const std::byte> bytes,
                                                    v1::FrameHeader& h) {
  if (bytes.size() > static_cast<std::size_t>(INT32_MAX)) return std::nullopt;
  if (!h.ParseFromArray(bytes.data(), static_cast<int>(bytes.size()))) return std::nullopt;
  if (h.contract_version() != kContractVersion) return std::nullopt;
  core::FrameFacts f;
  f.width_px = h.width_px();
  f.height_px = h.height_px();
  f.pixel_format = from_wire(h.pixel_type());
  f.pixel_type_code = static_cast<std::uint32_t>(h.pixel_type());
  f.row_stride_bytes = h.row_stride_bytes();
  return f;
}

namespace {
template <typename Field, typename Vec>
void copy_into(Field* field, const Vec& v) {
  field->Resize(static_cast<int>(v.size()), {});
  std::copy(v.begin(), v.end(), field->mutable_data());
}
}  // namespace

void encode_measurement(const core::FrameMeasurement& m, const MeasurementStamp& s,
                        v1::Measurement& msg) {
  msg.set_contract_version(kContractVersion);
  msg.set_frame_seq(s.frame_seq);
  msg.set_camera_time_ns(s.camera_time_ns);
  msg.set_received_time_ns(s.received_time_ns);
  msg.set_published_time_ns(s.published_time_ns);
  msg.set_centroider(to_wire(s.centroider));
  msg.set_slope_unit(to_wire(s.slope_unit));
  msg.set_units_per_px(s.units_per_px);
  msg.set_n_subap_x(static_cast<std::uint32_t>(s.n_subap_x));
  msg.set_n_subap_y(static_cast<std::uint32_t>(s.n_subap_y));
  copy_into(msg.mutable_slope_x(), m.slope_x_px);
  copy_into(msg.mutable_slope_y(), m.slope_y_px);
  copy_into(msg.mutable_slope_noise_var_x(), m.slope_var_x_px2);
  copy_into(msg.mutable_slope_noise_var_y(), m.slope_var_y_px2);
  if (s.units_per_px != 1.0) {
    const auto k = static_cast<float>(s.units_per_px);
    for (auto* f : {msg.mutable_slope_x(), msg.mutable_slope_y()})
      for (float& v : *f) v *= k;
    for (auto* f : {msg.mutable_slope_noise_var_x(), msg.mutable_slope_noise_var_y()})
      for (float& v : *f) v *= k * k;
  }
  copy_into(msg.mutable_flux_adu(), m.flux_adu);
  copy_into(msg.mutable_peak_adu(), m.peak_adu);
  copy_into(msg.mutable_flags(), m.flags);
  copy_into(msg.mutable_background_adu(), m.background_adu);
  copy_into(msg.mutable_snr(), m.snr);
  copy_into(msg.mutable_fwhm_x_px(), m.fwhm_x_px);
  copy_into(msg.mutable_fwhm_y_px(), m.fwhm_y_px);
  copy_into(msg.mutable_ellipticity(), m.ellipticity);
  copy_into(msg.mutable_quality(), m.quality);
  copy_into(msg.mutable_saturated_pixels(), m.saturated_pixels);
  msg.set_total_flux_adu(m.total_flux_adu);
  msg.set_median_fwhm_px(m.median_fwhm_px);
  msg.set_settings_generation(s.settings_generation);
  msg.set_health(m.health);
  msg.set_n_saturated(static_cast<std::uint32_t>(m.n_saturated));
  auto* valid = msg.mutable_valid();
  valid->Resize(m.size(), false);
  for (int i = 0; i < m.size(); ++i) valid->Set(i, m.flags[i] == core::kFlagNone);
  msg.set_n_valid(static_cast<std::uint32_t>(m.n_valid));
  msg.set_slope_rms_x(static_cast<float>(m.slope_rms_x_px * s.units_per_px));
  msg.set_slope_rms_y(static_cast<float>(m.slope_rms_y_px * s.units_per_px));
  msg.set_mean_flux_adu(m.mean_flux_adu);
  auto* t = msg.mutable_stage_times();
  t->set_check_us(s.check_us);
  t->set_centroid_us(s.centroid_us);
}

void to_wire(const std::string& key, const core::OptionValue& value, v1::CentroiderOption& out) {
  out.set_key(key);
  if (const double* d = std::get_if<double>(&value)) out.set_number(*d);
  else if (const bool* b = std::get_if<bool>(&value)) out.set_flag(*b);
  else out.set_text(std::get<std::string>(value));
}

std::optional<core::OptionValue> from_wire(const v1::CentroiderOption& o) {
  switch (o.value_case()) {
    case v1::CentroiderOption::kNumber: return core::OptionValue(o.number());
    case v1::CentroiderOption::kFlag: return core::OptionValue(o.flag());
    case v1::CentroiderOption::kText: return core::OptionValue(o.text());
    case v1::CentroiderOption::VALUE_NOT_SET: break;
  }
  return std::nullopt;
}

void describe_centroider(const core::CentroiderSettings& s, std::uint32_t generation, v1::CentroiderReply& out) {
  out.set_method(std::string(core::centroider_name(s.kind)));
  out.clear_options();
  for (const auto& [key, value] : core::list_options(s)) to_wire(key, value, *out.add_options());
  out.set_settings_generation(generation);
  out.set_summary(core::describe(s));
}

}  // namespace slopecast::io
