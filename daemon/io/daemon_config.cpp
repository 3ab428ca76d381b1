#include "daemon/io/daemon_config.h"

#include <algorithm>
#include <fstream>
#include <set>
#include <sstream>

#include <fmt/format.h>
#include <toml.hpp>

#include "daemon/io/fits_image.h"

namespace slopecast::io {

namespace {

// Reads typed values out of one TOML table, remembering which keys were used
// so that unknown keys can be reported afterwards.
class TableReader {
 public:
  TableReader(const toml::value* table, std::string name) : table_(table), name_(std::move(name)) {}

  std::string error;

  void integer(const char* key, int& out, long min, long max) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_integer()) return fail(key, "expected an integer");
    const long n = static_cast<long>(v->as_integer());
    if (n < min || n > max) return fail(key, fmt::format("must be {}..{}, got {}", min, max, n));
    out = static_cast<int>(n);
  }
  void number(const char* key, double& out, double min) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (v->is_integer()) out = static_cast<double>(v->as_integer());
    else if (v->is_floating()) out = v->as_floating();
    else return fail(key, "expected a number");
    if (!(out >= min)) return fail(key, fmt::format("must be >= {}, got {}", min, out));
  }
  void boolean(const char* key, bool& out) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_boolean()) return fail(key, "expected true or false");
    out = v->as_boolean();
  }
  void string(const char* key, std::string& out) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_string()) return fail(key, "expected a string");
    out = v->as_string().str;
  }
  // After all reads: any key not read is an error.
  void reject_unknown() {
    if (!table_ || !error.empty()) return;
    for (const auto& [key, value] : table_->as_table())
      if (!used_.count(key)) {
        error = fmt::format("[{}] has an unknown key '{}'", name_, key);
        return;
      }
  }

 private:
  const toml::value* find(const char* key) {
    used_.insert(key);
    if (!table_) return nullptr;
    const auto& t = table_->as_table();
    auto it = t.find(key);
    return it == t.end() ? nullptr : &it->second;
  }
  void fail(const char* key, const std::string& what) {
    error = fmt::format("[{}] {}: {}", name_, key, what);
  }
  const toml::value* table_;
  std::string name_;
  std::set<std::string> used_;
};

const std::set<std::string> kTables = {"endpoints", "camera", "lenslet_grid", "calibration", "centroider",
                                       "daemon"};

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
  toml::value root;
  try {
    std::istringstream in(text);
    root = toml::parse(in, source);
  } catch (const std::exception& e) {
    return ConfigError{e.what()};
  }
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
  ep.reject_unknown();
  if (!ep.error.empty()) return fail(ep.error);
  const Endpoints& eps = c.endpoints;
  for (const auto& [key, e] : {std::pair{"frames_in", &eps.frames_in}, std::pair{"measurements_out", &eps.measurements_out},
                               std::pair{"control", &eps.control}}) {
    if (auto err = validate_endpoint(*e); !err.empty()) return fail(fmt::format("[endpoints] {}: {}", key, err));
    for (auto& w : endpoint_warnings(*e)) c.warnings.push_back(fmt::format("[endpoints] {}: {}", key, w));
  }
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
  grid.reject_unknown();
  if (!grid.error.empty()) return fail(grid.error);
  if (p.grid.n_subap_x == 0 || p.grid.n_subap_y == 0 || p.grid.pitch_px == 0)
    return fail("[lenslet_grid] subapertures_x, subapertures_y and pitch_px are required");

  TableReader cal(table("calibration"), "calibration");
  std::string dark, background = core::background_mode_name(p.background);
  double saturation = 0.0;
  cal.string("dark_frame", dark);
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
    return fail(fmt::format("[calibration] background: '{}' is not one of \"border\", \"none\"", background));
  if (saturation > 0.0) p.saturation_adu = saturation;

  if (auto err = read_centroider(table("centroider"), p.centroider); !err.empty()) return fail(err);

  TableReader d(table("daemon"), "daemon");
  d.integer("frame_queue_depth", c.frame_queue_depth, 1, 10000);
  d.integer("measurement_queue_depth", c.measurement_queue_depth, 1, 100000);
  d.integer("latency_window_frames", c.latency_window_frames, 16, 1000000);
  d.integer("worker_threads", c.worker_threads, 1, 64);
  d.boolean("newest_frame_only", c.newest_frame_only);
  d.number("stale_after_s", c.stale_after_s, 0.001);
  double max_jump = static_cast<double>(c.max_seq_jump), max_frame = 0.0;
  d.number("max_seq_jump", max_jump, 1.0);
  d.number("max_frame_bytes", max_frame, 0.0);
  d.reject_unknown();
  if (!d.error.empty()) return fail(d.error);
  c.max_seq_jump = static_cast<std::uint64_t>(std::min(max_jump, 9.0e18));

  if (auto err = core::validate(p.camera); !err.empty()) return fail(err);
  if (auto err = core::validate(p.grid, p.camera); !err.empty()) return fail(err);
  const std::int64_t frame_bytes = static_cast<std::int64_t>(p.camera.width_px) * p.camera.height_px *
                                   static_cast<std::int64_t>(core::bytes_per_pixel(p.camera.format));
  const std::int64_t default_cap = std::max<std::int64_t>(4 * frame_bytes + (1 << 20), std::int64_t{64} << 20);
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
  if (dark.empty())
    c.warnings.push_back(
        p.background == core::BackgroundMode::kNone
            ? "[calibration] no dark_frame and background = \"none\": the camera bias stays in every box, "
              "pulling each centroid toward its box centre; configure a dark or background = \"border\""
            : "[calibration] no dark_frame: each box's border background removes bias and diffuse light, "
              "but fixed-pattern structure (hot pixels, uneven bias) stays in; acquire a dark for best results");
  if (!dark.empty() && what.load_images) {
    const std::filesystem::path& path = c.dark_frame;
    auto image = read_fits_image(path);
    if (auto* e = std::get_if<FitsError>(&image)) return fail("[calibration] dark_frame: " + e->message);
    auto& img = std::get<FitsImage>(image);
    if (img.width != p.camera.width_px || img.height != p.camera.height_px)
      return fail(fmt::format("[calibration] dark_frame {} is {} x {} px, the camera is {} x {} px",
                              path.string(), img.width, img.height, p.camera.width_px,
                              p.camera.height_px));
    p.dark_adu = std::move(img.pixels);
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
