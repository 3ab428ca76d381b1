#include "daemon/io/calibration_set.h"

#include <chrono>
#include <cmath>
#include <tuple>
#include <ctime>
#include <fstream>
#include <sstream>

#include <fmt/format.h>
#include <toml.hpp>

#include "daemon/io/fits_image.h"
#include "daemon/io/toml_table_reader.h"

namespace slopecast::io {

namespace fs = std::filesystem;

namespace {

constexpr int kFormat = 1;

struct Product {
  const char* name;
  const char* file;
};
constexpr Product kProducts[] = {{"layout", "layout.fits"},
                                 {"valid_map", "valid_map.fits"},
                                 {"reference_slopes", "reference_slopes.fits"},
                                 {"dark", "dark.fits"},
                                 {"sky", "sky.fits"},
                                 {"flat", "flat.fits"},
                                 {"bad_pixels", "bad_pixels.fits"}};

// A TOML basic string: quotes, backslashes and control characters escaped.
std::string toml_string(const std::string& s) {
  std::string out = "\"";
  for (unsigned char c : s) {
    if (c == '"' || c == '\\') out += '\\', out += static_cast<char>(c);
    else if (c < 0x20 || c == 0x7f) out += fmt::format("\\u{:04X}", c);
    else out += static_cast<char>(c);
  }
  return out + "\"";
}

FitsHeader header_for(const CalibrationSet& set, const char* product, const std::string& what) {
  FitsHeader h;
  const auto it = set.made.find(product);
  const Provenance p = it == set.made.end() ? Provenance{} : it->second;
  if (!p.created_utc.empty()) h.cards.push_back({"DATE", p.created_utc, "UTC when this product was made"});
  h.cards.push_back({"NCOMBINE", static_cast<long long>(p.frames), "frames averaged (0: not from frames)"});
  if (p.exposure_s > 0.0) h.cards.push_back({"EXPTIME", p.exposure_s, "[s] exposure of those frames"});
  h.cards.push_back({"NSUBX", static_cast<long long>(set.grid.n_subap_x), "subapertures across"});
  h.cards.push_back({"NSUBY", static_cast<long long>(set.grid.n_subap_y), "subapertures down"});
  h.cards.push_back({"BOXPX", static_cast<long long>(set.grid.pitch_px), "[px] subaperture box side"});
  h.history.push_back("slopecast calibration set: " + what);
  if (!p.command.empty()) h.history.push_back("made by: " + p.command);
  return h;
}

std::vector<float> as_float(const std::vector<std::uint8_t>& v) { return {v.begin(), v.end()}; }

std::string write_manifest(const CalibrationSet& set, const fs::path& file) {
  std::ostringstream t;
  t << "# slopecast calibration set: what is in this folder and where it came from.\n"
    << "# The FITS files beside it hold the data; see the README's calibration section.\n";
  t << fmt::format("format = {}\ncamera_width_px = {}\ncamera_height_px = {}\n", kFormat, set.camera_width_px,
                   set.camera_height_px);
  t << fmt::format("subapertures_x = {}\nsubapertures_y = {}\nbox_px = {}\n", set.grid.n_subap_x,
                   set.grid.n_subap_y, set.grid.pitch_px);
  if (set.lattice) {
    const core::LatticeFit& l = *set.lattice;
    t << fmt::format(
        "\n[lattice]\npitch_px = {:.6f}\nrotation_deg = {:.6f}\norigin_x_px = {:.6f}\norigin_y_px = {:.6f}\n"
        "residual_rms_px = {:.6f}\nspots_found = {}\nspots_used = {}\n",
        l.pitch_px, l.rotation_deg, l.origin_x_px, l.origin_y_px, l.residual_rms_px, l.spots_found, l.spots_used);
  }
  for (const Product& p : kProducts) {
    const auto it = set.made.find(p.name);
    const bool present = std::string(p.name) == "layout" || (std::string(p.name) == "valid_map" && !set.valid_map.empty()) ||
                         (std::string(p.name) == "reference_slopes" && !set.reference_slope_x_px.empty()) ||
                         (std::string(p.name) == "dark" && !set.dark_adu.empty()) ||
                         (std::string(p.name) == "sky" && !set.sky_adu.empty()) ||
                         (std::string(p.name) == "flat" && !set.flat.empty()) ||
                         (std::string(p.name) == "bad_pixels" && !set.bad_pixels.empty());
    if (!present) continue;
    const Provenance pv = it == set.made.end() ? Provenance{} : it->second;
    t << fmt::format("\n[files.{}]\nfile = {}\ncreated = {}\nframes = {}\nexposure_s = {}\ncommand = {}\n", p.name,
                     toml_string(p.file), toml_string(pv.created_utc), pv.frames, pv.exposure_s,
                     toml_string(pv.command));
  }
  const fs::path tmp = fs::path(file) += ".partial";
  {
    std::ofstream out(tmp, std::ios::trunc);
    out << t.str();
    out.flush();
    if (!out) return fmt::format("cannot write '{}'", tmp.string());
  }
  std::error_code ec;
  fs::rename(tmp, file, ec);
  if (ec) return fmt::format("cannot rename '{}' into place: {}", tmp.string(), ec.message());
  return {};
}

}  // namespace

std::string utc_now_iso() {
  const std::time_t t = std::chrono::system_clock::to_time_t(std::chrono::system_clock::now());
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buf[32];
  std::strftime(buf, sizeof buf, "%Y-%m-%dT%H:%M:%SZ", &tm);
  return buf;
}

namespace {
// The products a set and the pipeline settings both carry, under the same
// names, copied one way or the other.
template <typename From, typename To>
void copy_products(const From& from, To& to) {
  to.valid_map = from.valid_map;
  to.reference_slope_x_px = from.reference_slope_x_px;
  to.reference_slope_y_px = from.reference_slope_y_px;
  to.dark_adu = from.dark_adu;
  to.sky_adu = from.sky_adu;
  to.flat = from.flat;
  to.bad_pixels = from.bad_pixels;
}
}  // namespace

CalibrationSet calibration_of(const core::PipelineSettings& s) {
  CalibrationSet c;
  c.camera_width_px = s.camera.width_px;
  c.camera_height_px = s.camera.height_px;
  c.grid = core::LensletGrid{s.grid.n_subap_x, s.grid.n_subap_y, s.grid.pitch_px, 0, 0};
  c.layout = s.layout.empty() ? core::regular_layout(s.grid) : s.layout;
  copy_products(s, c);
  return c;
}

std::string apply_calibration(const CalibrationSet& set, core::PipelineSettings& settings) {
  if (set.camera_width_px != settings.camera.width_px || set.camera_height_px != settings.camera.height_px)
    return fmt::format("the calibration was made for a {} x {} camera; this camera is {} x {}", set.camera_width_px,
                       set.camera_height_px, settings.camera.width_px, settings.camera.height_px);
  core::PipelineSettings next = settings;
  next.grid = set.grid;
  next.layout = set.layout;
  copy_products(set, next);
  if (auto e = core::validate(next); !e.empty()) return "the calibration does not fit the settings: " + e;
  settings = std::move(next);
  return {};
}

std::string save_calibration_set(const CalibrationSet& set, const fs::path& dir) {
  auto fail = [&](const std::string& why) { return fmt::format("cannot save calibration set '{}': {}", dir.string(), why); };
  const auto n = static_cast<std::size_t>(set.grid.count());
  if (set.layout.size() != n)
    return fail(fmt::format("the layout has {} boxes, the grid {} subapertures", set.layout.size(), n));
  const fs::path partial = fs::path(dir) += ".partial", previous = fs::path(dir) += ".previous";
  std::error_code ec;
  fs::remove_all(partial, ec);
  if (!fs::create_directories(partial, ec) || ec) return fail("cannot create '" + partial.string() + "': " + ec.message());
  auto done = [&](const std::string& e) {
    std::error_code ignore;
    fs::remove_all(partial, ignore);
    return fail(e);
  };
  const int w = set.camera_width_px, h = set.camera_height_px, nx = set.grid.n_subap_x, ny = set.grid.n_subap_y;
  {
    FitsColumn cols[6] = {{"X0", true, "px", {}},  {"Y0", true, "px", {}},    {"WIDTH", true, "px", {}},
                          {"HEIGHT", true, "px", {}}, {"REF_X", false, "px", {}}, {"REF_Y", false, "px", {}}};
    for (const auto& b : set.layout) {
      cols[0].values.push_back(b.x0);
      cols[1].values.push_back(b.y0);
      cols[2].values.push_back(b.width);
      cols[3].values.push_back(b.height);
      cols[4].values.push_back(b.ref_x);
      cols[5].values.push_back(b.ref_y);
    }
    FitsHeader hd = header_for(set, "layout", "subaperture boxes and reference points (table LAYOUT)");
    if (set.lattice) {
      hd.cards.push_back({"PITCH", set.lattice->pitch_px, "[px] fitted lenslet pitch"});
      hd.cards.push_back({"ROTATION", set.lattice->rotation_deg, "[deg] fitted lattice rotation, +x toward +y"});
      hd.cards.push_back({"FITRMS", set.lattice->residual_rms_px, "[px] rms distance of spots from the lattice"});
    }
    if (auto e = write_fits_table(partial / "layout.fits", "LAYOUT", cols, hd); !e.empty()) return done(e);
  }
  if (!set.valid_map.empty()) {
    if (set.valid_map.size() != n) return done("the valid map does not have one entry per subaperture");
    if (auto e = write_fits_cube(partial / "valid_map.fits", nx, ny, 1, as_float(set.valid_map), FitsPixel::kU8,
                                 header_for(set, "valid_map", "valid map, 1 = subaperture in use"));
        !e.empty())
      return done(e);
  }
  if (!set.reference_slope_x_px.empty()) {
    if (set.reference_slope_x_px.size() != n || set.reference_slope_y_px.size() != n)
      return done("the reference slopes do not have one x and one y per subaperture");
    std::vector<float> both(set.reference_slope_x_px);
    both.insert(both.end(), set.reference_slope_y_px.begin(), set.reference_slope_y_px.end());
    if (auto e = write_fits_cube(partial / "reference_slopes.fits", nx, ny, 2, both, FitsPixel::kF32,
                                 header_for(set, "reference_slopes", "reference slopes, px: plane 1 x, plane 2 y"));
        !e.empty())
      return done(e);
  }
  const std::size_t pixels = static_cast<std::size_t>(w) * h;
  for (auto [vec, name, what] : {std::tuple{&set.dark_adu, "dark", "dark frame, ADU"},
                                 std::tuple{&set.sky_adu, "sky", "sky frame, ADU, dark removed"},
                                 std::tuple{&set.flat, "flat", "flat field, mean 1 over the pupil"}}) {
    if (vec->empty()) continue;
    if (vec->size() != pixels) return done(fmt::format("the {} is not {} x {} px", name, w, h));
    if (auto e = write_fits_cube(partial / (std::string(name) + ".fits"), w, h, 1, *vec, FitsPixel::kF32,
                                 header_for(set, name, what));
        !e.empty())
      return done(e);
  }
  if (!set.bad_pixels.empty()) {
    if (set.bad_pixels.size() != pixels) return done(fmt::format("the bad-pixel map is not {} x {} px", w, h));
    if (auto e = write_fits_cube(partial / "bad_pixels.fits", w, h, 1, as_float(set.bad_pixels), FitsPixel::kU8,
                                 header_for(set, "bad_pixels", "bad pixels: 1 hot, 2 cold, 4 noisy"));
        !e.empty())
      return done(e);
  }
  if (auto e = write_manifest(set, partial / kCalibrationManifest); !e.empty()) return done(e);
  // Swap the finished folder in.
  fs::remove_all(previous, ec);
  if (fs::exists(dir)) {
    fs::rename(dir, previous, ec);
    if (ec) return done("cannot move the old set aside: " + ec.message());
  }
  fs::rename(partial, dir, ec);
  if (ec) {
    std::error_code ignore;
    if (fs::exists(previous)) fs::rename(previous, dir, ignore);
    return done("cannot move the new set into place: " + ec.message());
  }
  fs::remove_all(previous, ec);
  return {};
}

namespace {

// Reads product `name`'s FITS cube and checks its size.
std::variant<std::vector<float>, std::string> read_sized(const fs::path& file, int w, int h, int planes,
                                                         const char* what) {
  auto cube = read_fits_cube(file, FitsShape{w, h, planes});
  if (auto* e = std::get_if<FitsError>(&cube)) return what + std::string(": ") + e->message;
  const FitsCube& c = std::get<FitsCube>(cube);
  if (c.width != w || c.height != h || c.planes != planes)
    return fmt::format("{} '{}' is {} x {} x {}, expected {} x {} x {}", what, file.string(), c.width, c.height,
                       c.planes, w, h, planes);
  return c.pixels;
}

std::variant<std::vector<std::uint8_t>, std::string> read_map(const fs::path& file, int w, int h, const char* what,
                                                             int max_value) {
  auto v = read_sized(file, w, h, 1, what);
  if (auto* e = std::get_if<std::string>(&v)) return *e;
  std::vector<std::uint8_t> out;
  for (float f : std::get<std::vector<float>>(v)) {
    if (!(f >= 0.0f && f <= static_cast<float>(max_value) && f == static_cast<float>(static_cast<int>(f))))
      return fmt::format("{} '{}' holds {}; expected whole numbers 0..{}", what, file.string(), f, max_value);
    out.push_back(static_cast<std::uint8_t>(f));
  }
  return out;
}

std::variant<std::vector<core::SubapertureBox>, std::string> layout_from_table(const FitsTable& t,
                                                                              const fs::path& file) {
  const char* names[] = {"X0", "Y0", "WIDTH", "HEIGHT", "REF_X", "REF_Y"};
  const FitsColumn* c[6];
  for (int k = 0; k < 6; ++k)
    if (!(c[k] = t.find(names[k])))
      return fmt::format("layout table '{}' has no column {} (needs X0 Y0 WIDTH HEIGHT REF_X REF_Y)", file.string(),
                         names[k]);
  std::vector<core::SubapertureBox> boxes;
  for (long r = 0; r < t.rows; ++r) {
    core::SubapertureBox b;
    int* ints[4] = {&b.x0, &b.y0, &b.width, &b.height};
    for (int k = 0; k < 4; ++k) {
      const double v = c[k]->values[static_cast<std::size_t>(r)];
      if (v != std::floor(v) || v < -1e6 || v > 1e6)
        return fmt::format("layout table '{}' row {}: {} = {} is not a whole number of px", file.string(), r + 1,
                           names[k], v);
      *ints[k] = static_cast<int>(v);
    }
    b.ref_x = c[4]->values[static_cast<std::size_t>(r)];
    b.ref_y = c[5]->values[static_cast<std::size_t>(r)];
    boxes.push_back(b);
  }
  return boxes;
}

}  // namespace

std::variant<CalibrationSet, std::string> load_calibration_set(const fs::path& dir, const core::CameraSpec& camera) {
  auto fail = [&](const std::string& why) { return fmt::format("calibration set '{}': {}", dir.string(), why); };
  const fs::path manifest = dir / kCalibrationManifest;
  if (!fs::is_regular_file(manifest)) return fail(fmt::format("no {} in the folder", kCalibrationManifest));
  toml::value root;
  try {
    std::ifstream in(manifest, std::ios::binary);
    std::string text((std::istreambuf_iterator<char>(in)), {});
    if (auto e = check_toml_shape(text); !e.empty()) return fail(e);
    std::istringstream stream(text);
    root = toml::parse(stream, manifest.string());
  } catch (const std::exception& e) {
    return fail(e.what());
  }
  CalibrationSet set;
  int format = 0;
  TableReader top(&root, "manifest");
  top.integer("format", format, 1, 1000);
  top.integer("camera_width_px", set.camera_width_px, 1, 16384);
  top.integer("camera_height_px", set.camera_height_px, 1, 16384);
  top.integer("subapertures_x", set.grid.n_subap_x, 1, 4096);
  top.integer("subapertures_y", set.grid.n_subap_y, 1, 4096);
  top.integer("box_px", set.grid.pitch_px, 2, 1024);
  const auto& table = root.as_table();
  const toml::value* lattice = table.count("lattice") ? &table.at("lattice") : nullptr;
  const toml::value* files = table.count("files") ? &table.at("files") : nullptr;
  if (!top.error.empty()) return fail(top.error);
  for (const auto& [key, v] : table)
    if (key != "format" && key != "camera_width_px" && key != "camera_height_px" && key != "subapertures_x" &&
        key != "subapertures_y" && key != "box_px" && key != "lattice" && key != "files")
      return fail(fmt::format("unknown manifest key '{}'", key));
  if (format != kFormat) return fail(fmt::format("format {} is not one this slopecast reads ({})", format, kFormat));
  if (set.grid.n_subap_x == 0 || set.grid.pitch_px == 0) return fail("the manifest lacks the grid shape");
  if (set.camera_width_px != camera.width_px || set.camera_height_px != camera.height_px)
    return fail(fmt::format("made for a {} x {} camera; this camera is {} x {}", set.camera_width_px,
                            set.camera_height_px, camera.width_px, camera.height_px));
  if (lattice) {
    if (!lattice->is_table()) return fail("[lattice] must be a table");
    core::LatticeFit l;
    TableReader r(lattice, "lattice");
    const double lo = -1e300;
    r.number("pitch_px", l.pitch_px, 0.0);
    r.number("rotation_deg", l.rotation_deg, lo);
    r.number("origin_x_px", l.origin_x_px, lo);
    r.number("origin_y_px", l.origin_y_px, lo);
    r.number("residual_rms_px", l.residual_rms_px, 0.0);
    r.integer("spots_found", l.spots_found, 0, 1 << 30);
    r.integer("spots_used", l.spots_used, 0, 1 << 30);
    r.reject_unknown();
    if (!r.error.empty()) return fail(r.error);
    set.lattice = l;
  }
  if (!files || !files->is_table()) return fail("no [files] table");
  for (const auto& [name, v] : files->as_table()) {
    bool known = false;
    for (const Product& p : kProducts) known |= name == p.name;
    if (!known) return fail(fmt::format("unknown product [files.{}]", name));
    if (!v.is_table()) return fail(fmt::format("[files.{}] must be a table", name));
    Provenance pv;
    std::string file;
    TableReader r(&v, "files." + name);
    r.string("file", file);
    r.string("created", pv.created_utc);
    int frames = 0;
    r.integer("frames", frames, 0, 1 << 30);
    pv.frames = frames;
    r.number("exposure_s", pv.exposure_s, 0.0);
    r.string("command", pv.command);
    r.reject_unknown();
    if (!r.error.empty()) return fail(r.error);
    set.made[name] = pv;
  }
  if (!set.made.count("layout")) return fail("the manifest lists no layout ([files.layout])");

  const int w = set.camera_width_px, h = set.camera_height_px, nx = set.grid.n_subap_x, ny = set.grid.n_subap_y;
  {
    auto t = read_fits_table(dir / "layout.fits", "LAYOUT");
    if (auto* e = std::get_if<FitsError>(&t)) return fail(e->message);
    auto boxes = layout_from_table(std::get<FitsTable>(t), dir / "layout.fits");
    if (auto* e = std::get_if<std::string>(&boxes)) return fail(*e);
    set.layout = std::move(std::get<std::vector<core::SubapertureBox>>(boxes));
    if (auto e = core::validate_layout(set.layout, set.grid, camera); !e.empty()) return fail("layout.fits: " + e);
  }
  if (set.made.count("valid_map")) {
    auto m = read_map(dir / "valid_map.fits", nx, ny, "valid map", 1);
    if (auto* e = std::get_if<std::string>(&m)) return fail(*e);
    set.valid_map = std::move(std::get<std::vector<std::uint8_t>>(m));
  }
  if (set.made.count("reference_slopes")) {
    auto v = read_sized(dir / "reference_slopes.fits", nx, ny, 2, "reference slopes");
    if (auto* e = std::get_if<std::string>(&v)) return fail(*e);
    const auto& both = std::get<std::vector<float>>(v);
    const auto n = static_cast<std::ptrdiff_t>(nx) * ny;
    set.reference_slope_x_px.assign(both.begin(), both.begin() + n);
    set.reference_slope_y_px.assign(both.begin() + n, both.end());
  }
  for (auto [vec, name] : {std::pair{&set.dark_adu, "dark"}, std::pair{&set.sky_adu, "sky"}, std::pair{&set.flat, "flat"}}) {
    if (!set.made.count(name)) continue;
    auto v = read_sized(dir / (std::string(name) + ".fits"), w, h, 1, name);
    if (auto* e = std::get_if<std::string>(&v)) return fail(*e);
    *vec = std::move(std::get<std::vector<float>>(v));
  }
  if (set.made.count("bad_pixels")) {
    auto m = read_map(dir / "bad_pixels.fits", w, h, "bad-pixel map", 7);
    if (auto* e = std::get_if<std::string>(&m)) return fail(*e);
    set.bad_pixels = std::move(std::get<std::vector<std::uint8_t>>(m));
  }
  return set;
}

std::variant<std::vector<core::SubapertureBox>, std::string> read_layout_file(const fs::path& path) {
  const std::string ext = path.extension().string();
  if (ext == ".fits" || ext == ".fit" || ext == ".fts") {
    auto t = read_fits_table(path, "LAYOUT");
    if (auto* e = std::get_if<FitsError>(&t)) return e->message;
    return layout_from_table(std::get<FitsTable>(t), path);
  }
  std::ifstream in(path);
  if (!in) return fmt::format("cannot read layout file '{}'", path.string());
  std::string line;
  std::vector<core::SubapertureBox> boxes;
  int line_no = 0;
  bool header = false;
  while (std::getline(in, line)) {
    ++line_no;
    if (!line.empty() && line.back() == '\r') line.pop_back();
    if (line.empty() || line[0] == '#') continue;
    std::string compact;
    for (char ch : line)
      if (ch != ' ' && ch != '\t') compact += ch;
    if (!header) {
      if (compact != "x0,y0,width,height,ref_x,ref_y")
        return fmt::format("layout file '{}' line {}: expected the header x0,y0,width,height,ref_x,ref_y", path.string(),
                           line_no);
      header = true;
      continue;
    }
    std::istringstream fields(compact);
    std::string f[6], extra;
    for (auto& s : f) std::getline(fields, s, ',');
    std::getline(fields, extra, ',');
    core::SubapertureBox b;
    try {
      std::size_t used = 0;
      int* ints[4] = {&b.x0, &b.y0, &b.width, &b.height};
      for (int k = 0; k < 4; ++k) {
        *ints[k] = std::stoi(f[k], &used);
        if (used != f[k].size()) throw std::invalid_argument("trailing");
      }
      b.ref_x = std::stod(f[4], &used);
      if (used != f[4].size()) throw std::invalid_argument("trailing");
      b.ref_y = std::stod(f[5], &used);
      if (used != f[5].size()) throw std::invalid_argument("trailing");
    } catch (const std::exception&) {
      return fmt::format("layout file '{}' line {}: expected four integers and two numbers, got '{}'", path.string(),
                         line_no, line);
    }
    if (!extra.empty())
      return fmt::format("layout file '{}' line {}: more than six fields", path.string(), line_no);
    boxes.push_back(b);
  }
  if (!header) return fmt::format("layout file '{}' is empty", path.string());
  return boxes;
}

}  // namespace slopecast::io
