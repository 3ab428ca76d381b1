#include "daemon/io/daemon_config.h"

#include <algorithm>
#include <fstream>
#include <set>
#include <sstream>

#include <fmt/format.h>
#include <toml.hpp>

#include "daemon/core/calibration/valid_map.h"
#include "daemon/io/calibration_set.h"
#include "daemon/io/fits_image.h"
#include "daemon/io/toml_table_reader.h"

namespace slopecast::io {

namespace {

const std::set<std::string> kTables = {"endpoints", "camera", "lenslet_grid", "calibration", "centroider",
                                       "optics", "security", "daemon", "insight", "shadow"};

std::filesystem::path resolve(const std::filesystem::path& base_dir, const std::string& name) {
  std::filesystem::path path(name);
  return path.is_relative() ? base_dir / path : path;
}

// Every key of [centroider] goes through core::apply_option, the one place
// those keys are known (shared with live control requests).
std::string read_centroider(const toml::value* table, core::CentroiderSettings& s) {
  if (!table) return {};
  for (const auto& [key, v] : table->as_table()) {
    core::OptionValue value;
    if (v.is_integer()) value = static_cast<double>(v.as_integer());
    else if (v.is_floating()) value = v.as_floating();
    else if (v.is_boolean()) value = v.as_boolean();
    else if (v.is_string()) value = v.as_string().str;
    else return fmt::format("[centroider] {}: expected a number, true/false or a string", key);
    if (auto e = core::apply_option(s, key, value); !e.empty()) return "[centroider] " + e;
  }
  return {};
}

}  // namespace

std::variant<DaemonConfig, ConfigError> parse_daemon_config(const std::string& text,
                                                            const std::string& source,
                                                            const std::filesystem::path& base_dir,
                                                            ConfigLoad what) {
  auto fail = [&](const std::string& msg) { return ConfigError{fmt::format("{}: {}", source, msg)}; };
  auto parsed = parse_toml_text(text, source);
  if (auto* e = std::get_if<std::string>(&parsed)) return ConfigError{*e};
  const toml::value& root = std::get<toml::value>(parsed);
  for (const auto& [key, value] : root.as_table()) {
    if (!kTables.count(key)) return fail(fmt::format("unknown table or key '{}'", key));
    if (!value.is_table()) return fail(fmt::format("'{}' must be a table ([{}])", key, key));
  }
  auto table = [&](const char* name) -> const toml::value* {
    const auto& t = root.as_table();
    auto it = t.find(name);
    return it == t.end() ? nullptr : &it->second;
  };

  DaemonConfig c;
  core::PipelineSettings& p = c.pipeline;

  TableReader ep(table("endpoints"), "endpoints");
  ep.string("frames_in", c.endpoints.frames_in);
  ep.string("measurements_out", c.endpoints.measurements_out);
  ep.string("control", c.endpoints.control);
  ep.string("insight_out", c.endpoints.insight_out);
  ep.reject_unknown();
  if (!ep.error.empty()) return fail(ep.error);
  const Endpoints& eps = c.endpoints;
  for (const auto& [key, e] : {std::pair{"frames_in", &eps.frames_in}, std::pair{"measurements_out", &eps.measurements_out},
                               std::pair{"control", &eps.control}, std::pair{"insight_out", &eps.insight_out}}) {
    if (auto err = validate_endpoint(*e); !err.empty()) return fail(fmt::format("[endpoints] {}: {}", key, err));
    for (auto& w : endpoint_warnings(*e)) c.warnings.push_back(fmt::format("[endpoints] {}: {}", key, w));
  }
  if (eps.insight_out == eps.control || eps.insight_out == eps.measurements_out)
    return fail(fmt::format("[endpoints] insight_out '{}' is also measurements_out or control; the daemon binds each, "
                            "so they must differ", eps.insight_out));
  if (eps.measurements_out == eps.control)
    return fail(fmt::format("[endpoints] measurements_out and control are both '{}'; the daemon binds each, "
                            "so they must differ", eps.control));
  if (eps.frames_in == eps.measurements_out || eps.frames_in == eps.control)
    c.warnings.push_back(fmt::format(
        "[endpoints] frames_in '{}' is also one of the daemon's own bound endpoints: it would listen to "
        "itself and never hear a camera", eps.frames_in));
  if (eps.frames_in.rfind("inproc://", 0) == 0)
    c.warnings.push_back(fmt::format(
        "[endpoints] frames_in '{}' is inproc://, which only reaches sockets inside slopecastd itself: no "
        "camera process can publish there", eps.frames_in));

  if (!table("camera")) return fail("missing table [camera] (width_px, height_px, pixel_type)");
  TableReader cam(table("camera"), "camera");
  std::string pixel_type;
  cam.integer("width_px", p.camera.width_px, 1, 16384);
  cam.integer("height_px", p.camera.height_px, 1, 16384);
  cam.string("pixel_type", pixel_type);
  cam.number("read_noise_e", p.read_noise_e, 0.0);
  cam.number("gain_e_per_adu", p.gain_e_per_adu, 0.0);
  cam.reject_unknown();
  if (!cam.error.empty()) return fail(cam.error);
  if (p.camera.width_px == 0 || p.camera.height_px == 0)
    return fail("[camera] width_px and height_px are required");
  if (pixel_type.empty()) return fail("[camera] pixel_type is required (u8, u16, u32 or f32)");
  auto format = core::parse_pixel_format(pixel_type);
  if (!format) return fail(fmt::format("[camera] pixel_type: '{}' is not one of u8, u16, u32, f32", pixel_type));
  p.camera.format = *format;

  if (!table("lenslet_grid"))
    return fail("missing table [lenslet_grid] (subapertures_x, subapertures_y, pitch_px, origin_x_px, origin_y_px)");
  TableReader grid(table("lenslet_grid"), "lenslet_grid");
  grid.integer("subapertures_x", p.grid.n_subap_x, 1, 4096);
  grid.integer("subapertures_y", p.grid.n_subap_y, 1, 4096);
  grid.integer("pitch_px", p.grid.pitch_px, 2, 1024);
  grid.integer("origin_x_px", p.grid.origin_x_px, 0, 16384);
  grid.integer("origin_y_px", p.grid.origin_y_px, 0, 16384);
  std::string layout_file;
  grid.path("layout_file", layout_file);
  grid.reject_unknown();
  if (!grid.error.empty()) return fail(grid.error);
  if (p.grid.n_subap_x == 0 || p.grid.n_subap_y == 0 || p.grid.pitch_px == 0)
    return fail("[lenslet_grid] subapertures_x, subapertures_y and pitch_px are required");

  TableReader cal(table("calibration"), "calibration");
  std::string dark, background = core::background_mode_name(p.background), set, cal_dir = "calibrations",
                    valid_map_file;
  double saturation = 0.0;
  core::PupilSpec pupil;
  double pupil_fraction = 0.5;
  cal.path("set", set);
  cal.path("calibration_dir", cal_dir);
  cal.path("valid_map_file", valid_map_file);
  cal.number("pupil_centre_x_px", pupil.centre_x_px, -1e9);
  cal.number("pupil_centre_y_px", pupil.centre_y_px, -1e9);
  cal.number("pupil_diameter_px", pupil.diameter_px, 0.0);
  cal.number("pupil_obstruction", pupil.obstruction, 0.0);
  cal.number("pupil_min_area_fraction", pupil_fraction, 0.0);
  cal.path("dark_frame", dark);
  std::string sky;
  cal.path("sky_frame", sky);
  cal.string("background", background);
  cal.number("min_flux_adu", p.min_flux_adu, 0.0);
  cal.number("min_snr", p.min_snr, 0.0);
  cal.number("saturation_adu", saturation, 0.0);
  cal.number("min_valid_fraction", p.min_valid_fraction, 0.0);
  cal.number("edge_margin_px", p.edge_margin_px, 0.0);
  cal.number("min_contrast", p.min_contrast, 0.0);
  cal.number("max_fwhm_px", p.max_fwhm_px, 0.0);
  cal.number("min_fwhm_px", p.min_fwhm_px, 0.0);
  cal.number("max_ellipticity", p.max_ellipticity, 0.0);
  cal.reject_unknown();
  if (!cal.error.empty()) return fail(cal.error);
  if (!core::parse_background_mode(background.c_str(), p.background))
    return fail(fmt::format("[calibration] background: '{}' is not one of \"border\", \"border_median\", \"none\"",
                            background));
  if (saturation > 0.0) p.saturation_adu = saturation;

  if (auto err = read_centroider(table("centroider"), p.centroider); !err.empty()) return fail(err);

  TableReader op(table("optics"), "optics");
  std::string unit = "px";
  op.string("slope_unit", unit);
  op.number("pixel_size_um", c.optics.pixel_size_um, 0.0);
  op.number("lenslet_focal_length_mm", c.optics.lenslet_focal_length_mm, 0.0);
  op.number("lenslet_pitch_um", c.optics.lenslet_pitch_um, 0.0);
  op.number("plate_scale_arcsec_per_px", c.optics.plate_scale_arcsec_per_px, 0.0);
  op.reject_unknown();
  if (!op.error.empty()) return fail(op.error);
  {
    bool known = false;
    for (auto u : {core::SlopeUnit::kPx, core::SlopeUnit::kRad, core::SlopeUnit::kNm, core::SlopeUnit::kArcsec})
      if (unit == core::slope_unit_name(u)) c.slope_unit = u, known = true;
    if (!known) return fail(fmt::format("[optics] slope_unit: '{}' is not one of \"px\", \"rad\", \"nm\", \"arcsec\"", unit));
    auto k = core::units_per_px(c.slope_unit, c.optics);
    if (auto* e = std::get_if<std::string>(&k)) return fail("[optics] " + *e);
    c.units_per_px = std::get<double>(k);
  }

  TableReader sec(table("security"), "security");
  std::string server_key, clients_file;
  sec.path("server_key_file", server_key);
  sec.path("clients_file", clients_file);
  sec.reject_unknown();
  if (!sec.error.empty()) return fail(sec.error);
  if (server_key.empty() != clients_file.empty())
    return fail("[security] needs both server_key_file (the daemon's key pair) and clients_file (who may "
                "connect), or neither");
  if (!server_key.empty()) {
    c.curve = true;
    if (what.load_images) {
      auto keys = read_key_file(resolve(base_dir, server_key), true);
      if (auto* e = std::get_if<std::string>(&keys)) return fail("[security] server_key_file: " + *e);
      c.server_keys = std::get<CurveKeyPair>(keys);
      auto clients = read_clients_file(resolve(base_dir, clients_file));
      if (auto* e = std::get_if<std::string>(&clients)) return fail("[security] clients_file: " + *e);
      c.clients = std::get<std::vector<ClientKey>>(clients);
    }
  }

  {
    InsightSettings& in = c.insight;
    TableReader r(table("insight"), "insight");
    r.boolean("enabled", in.enabled);
    r.number("report_rate_hz", in.report_rate_hz, 0.01);
    r.integer("window_frames", in.window_frames, 10, 100000);
    r.integer("zernike_max_noll", in.zernike_max_noll, 3, 66);
    r.number("telescope_diameter_m", in.telescope_diameter_m, 0.0);
    r.number("outer_scale_m", in.outer_scale_m, 0.01);
    r.number("sensing_wavelength_nm", in.sensing_wavelength_nm, 0.0);
    r.number("strehl_wavelength_nm", in.strehl_wavelength_nm, 0.0);
    r.boolean("loop_closed", in.loop_closed);
    r.number("preview_rate_hz", in.preview_rate_hz, 0.0);
    r.integer("preview_max_side_px", in.preview_max_side_px, 16, 4096);
    r.reject_unknown();
    if (!r.error.empty()) return fail(r.error);
    if (in.report_rate_hz > 1000) return fail("[insight] report_rate_hz must be at most 1000");
    if (in.preview_rate_hz > 100) return fail("[insight] preview_rate_hz must be at most 100");
    if (const auto* sh = table("shadow")) {
      in.shadow = true;
      if (auto err = read_centroider(sh, in.shadow_centroider); !err.empty())
        return fail("[shadow] " + err.substr(err.find(']') + 2));
      if (in.shadow_centroider.reference != core::ReferenceSource::kGaussian)
        return fail("[shadow] reference: the shadow centroider takes the synthetic (Gaussian) reference only");
    }
    if (!in.enabled && in.shadow) c.warnings.push_back("[shadow] is set but [insight] enabled is false: no shadow runs");
  }

  TableReader d(table("daemon"), "daemon");
  d.integer("frame_queue_depth", c.frame_queue_depth, 1, 10000);
  d.integer("measurement_queue_depth", c.measurement_queue_depth, 1, 100000);
  // Each status request sorts a copy of the window on the loop thread: 65 536
  // frames cost a few ms, a million cost 60 ms (frames lost at 1 kHz).
  d.integer("latency_window_frames", c.latency_window_frames, 16, 65536);
  d.integer("worker_threads", c.worker_threads, 1, 64);
  d.boolean("newest_frame_only", c.newest_frame_only);
  d.string("sensor_name", c.sensor_name);
  d.number("stale_after_s", c.stale_after_s, 0.001);
  double max_jump = static_cast<double>(c.max_seq_jump), max_frame = 0.0;
  d.number("max_seq_jump", max_jump, 1.0);
  d.number("max_frame_bytes", max_frame, 0.0);
  d.reject_unknown();
  if (!d.error.empty()) return fail(d.error);
  if (c.sensor_name.size() > 64) return fail("[daemon] sensor_name: at most 64 characters");
  c.max_seq_jump = static_cast<std::uint64_t>(std::min(max_jump, 9.0e18));

  if (auto err = core::validate(p.camera); !err.empty()) return fail(err);
  if (!set.empty() && !layout_file.empty())
    return fail("[calibration] set carries its own layout; [lenslet_grid] layout_file cannot be used with it");
  if (!set.empty() && (!dark.empty() || !sky.empty()))
    return fail("[calibration] set carries its own dark and sky (or none); dark_frame and sky_frame cannot be used "
                "with it");
  if (layout_file.empty() && set.empty()) {
    if (auto err = core::validate(p.grid, p.camera); !err.empty()) return fail(err);
  }
  c.calibration_dir = resolve(base_dir, cal_dir);
  const std::int64_t frame_bytes = static_cast<std::int64_t>(p.camera.width_px) * p.camera.height_px *
                                   static_cast<std::int64_t>(core::bytes_per_pixel(p.camera.format));
  // Twice the frame (rows padded up to double their width still fit) plus
  // 64 KiB: ZeroMQ checks the cap per message part but buffers a whole
  // multi-part message before the daemon can count its parts, so the cap
  // is what bounds each part of a hostile many-part message.
  const std::int64_t default_cap = 2 * frame_bytes + (std::int64_t{1} << 16);
  c.max_frame_bytes = max_frame > 0.0 ? static_cast<std::int64_t>(max_frame) : default_cap;
  if (c.max_frame_bytes < frame_bytes)
    return fail(fmt::format("[daemon] max_frame_bytes {} is smaller than one {} x {} {} frame ({} bytes)",
                            c.max_frame_bytes, p.camera.width_px, p.camera.height_px,
                            core::pixel_format_name(p.camera.format), frame_bytes));

  if (!dark.empty()) {
    std::filesystem::path path(dark);
    if (path.is_relative()) path = base_dir / path;
    c.dark_frame = path;
  }
  if (dark.empty() && set.empty())
    c.warnings.push_back(
        p.background == core::BackgroundMode::kNone
            ? "[calibration] no dark_frame and background = \"none\": the camera bias stays in every box, "
              "pulling each centroid toward its box centre; configure a dark or background = \"border\""
            : "[calibration] no dark_frame: each box's border background removes bias and diffuse light, "
              "but fixed-pattern structure (hot pixels, uneven bias) stays in; acquire a dark (`slopecast calibrate dark`, light off) for best results");
  if (!dark.empty() && what.load_images) {
    const std::filesystem::path& path = c.dark_frame;
    auto image = read_fits_image(path, FitsShape{p.camera.width_px, p.camera.height_px, 1});
    if (auto* e = std::get_if<FitsError>(&image)) return fail("[calibration] dark_frame: " + e->message);
    p.dark_adu = std::move(std::get<FitsImage>(image).pixels);
  }
  if (!sky.empty() && what.load_images) {
    const auto path = resolve(base_dir, sky);
    auto image = read_fits_image(path, FitsShape{p.camera.width_px, p.camera.height_px, 1});
    if (auto* e = std::get_if<FitsError>(&image)) return fail("[calibration] sky_frame: " + e->message);
    p.sky_adu = std::move(std::get<FitsImage>(image).pixels);
  }
  if (!layout_file.empty()) {
    c.layout_file = resolve(base_dir, layout_file);
    auto boxes = read_layout_file(c.layout_file);
    if (auto* e = std::get_if<std::string>(&boxes)) return fail("[lenslet_grid] layout_file: " + *e);
    p.layout = std::move(std::get<std::vector<core::SubapertureBox>>(boxes));
    if (auto err = core::validate_layout(p.layout, p.grid, p.camera); !err.empty())
      return fail("[lenslet_grid] layout_file " + c.layout_file.string() + ": " + err);
  }
  if (!set.empty()) {
    // The set is the sensor's geometry, so clients that skip images read
    // it too; for them a missing or broken set is a warning, not an error.
    c.calibration_set = resolve(base_dir, set);
    auto loaded = load_calibration_set(c.calibration_set, p.camera);
    std::string err = std::holds_alternative<std::string>(loaded) ? std::get<std::string>(loaded) : std::string();
    if (err.empty()) {
      const auto& cs = std::get<CalibrationSet>(loaded);
      err = apply_calibration(cs, p);
      c.lattice = cs.lattice;
      c.calibration_made = cs.made;
    }
    if (!err.empty() && what.load_images) return fail("[calibration] set: " + err);
    if (!err.empty()) c.warnings.push_back("[calibration] set: " + err);
  }
  // Valid maps from a file or a pupil, combined with the set's.
  if (!valid_map_file.empty() && what.load_images) {
    const auto path = resolve(base_dir, valid_map_file);
    auto image = read_fits_image(path, FitsShape{p.grid.n_subap_x, p.grid.n_subap_y, 1});
    if (auto* e = std::get_if<FitsError>(&image)) return fail("[calibration] valid_map_file: " + e->message);
    const auto& img = std::get<FitsImage>(image);
    std::vector<std::uint8_t> map;
    for (float v : img.pixels) map.push_back(v != 0.0f);
    p.valid_map = core::combine_maps(p.valid_map, map);
  }
  if (pupil.diameter_px > 0.0) {
    if (auto err = core::validate(pupil); !err.empty()) return fail("[calibration] " + err);
    if (!(pupil_fraction > 0.0 && pupil_fraction <= 1.0))
      return fail(fmt::format("[calibration] pupil_min_area_fraction must be 0 < f <= 1, got {}", pupil_fraction));
    const auto boxes = p.layout.empty() ? core::regular_layout(p.grid) : p.layout;
    p.valid_map = core::combine_maps(p.valid_map, core::valid_from_pupil(boxes, pupil, pupil_fraction));
    c.pupil = pupil;
  } else if (pupil.obstruction > 0.0 || pupil.centre_x_px != 0.0 || pupil.centre_y_px != 0.0) {
    return fail("[calibration] a pupil needs pupil_diameter_px (with pupil_centre_x_px, pupil_centre_y_px and "
                "optionally pupil_obstruction)");
  }
  c.base_dir = base_dir;
  if (p.centroider.reference == core::ReferenceSource::kCaptured)
    return fail("[centroider] reference = \"captured\" exists only live (the daemon captures it from its "
                "frames on request); in the file use \"gaussian\", or \"file\" with reference_file");
  if (what.load_images) {
    if (auto err = load_reference_image(p.centroider, base_dir); !err.empty()) return fail("[centroider] " + err);
    if (auto err = core::validate(p); !err.empty()) return fail(err);
  } else {
    // Without the images, check everything else.
    core::PipelineSettings q = p;
    if (q.centroider.reference == core::ReferenceSource::kFile) q.centroider.reference = core::ReferenceSource::kGaussian;
    q.dark_adu.clear();
    q.sky_adu.clear();
    if (auto err = core::validate(q); !err.empty()) return fail(err);
  }
  return c;
}

std::string load_reference_image(core::CentroiderSettings& s, const std::filesystem::path& base_dir) {
  if (s.reference != core::ReferenceSource::kFile) return {};
  if (s.reference_file.empty()) return "reference = \"file\" needs reference_file (a FITS image of one box)";
  std::filesystem::path path(s.reference_file);
  if (path.is_relative()) path = base_dir / path;
  auto image = read_fits_image(path);
  if (auto* e = std::get_if<FitsError>(&image)) return "reference_file: " + e->message;
  auto& img = std::get<FitsImage>(image);
  if (img.width != img.height)
    return fmt::format("reference_file {} is {} x {} px; it must be one square box", path.string(), img.width,
                       img.height);
  s.reference_image = std::move(img.pixels);
  s.reference_size = img.width;
  return {};
}

std::variant<DaemonConfig, ConfigError> load_daemon_config(const std::filesystem::path& file, ConfigLoad what) {
  if (std::filesystem::is_directory(file))
    return ConfigError{fmt::format("'{}' is a directory, not a config file", file.string())};
  std::ifstream in(file, std::ios::binary);
  if (!in) return ConfigError{fmt::format("cannot open config file '{}'", file.string())};
  std::stringstream text;
  text << in.rdbuf();
  return parse_daemon_config(text.str(), file.string(), file.parent_path(), what);
}

}  // namespace slopecast::io

namespace slopecast::io {

std::map<std::string, std::set<std::string>> accepted_config_keys() {
  std::map<std::string, std::set<std::string>> keys;
  TableReader::catalogue() = &keys;
  // A minimal config: every table's reader looks up all of its keys whether
  // or not they are present.
  (void)parse_daemon_config("[camera]\nwidth_px = 16\nheight_px = 16\npixel_type = \"u16\"\n"
                            "[lenslet_grid]\nsubapertures_x = 2\nsubapertures_y = 2\npitch_px = 8\n",
                            "catalogue", ".", ConfigLoad{false});
  TableReader::catalogue() = nullptr;
  // [centroider] and [shadow] take the option table's keys.
  for (const char* table : {"centroider", "shadow"})
    for (const auto& o : core::kCentroiderOptions) keys[table].insert(std::string(o.key));
  return keys;
}

}  // namespace slopecast::io
