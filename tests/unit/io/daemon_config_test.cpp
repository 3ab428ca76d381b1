// The daemon's TOML config: what is accepted, and the messages for what is not.
#include <catch2/catch.hpp>

#include <filesystem>
#include <fstream>
#include <map>
#include <set>

#include "daemon/io/daemon_config.h"
#include "daemon/io/fits_image.h"
#include "tests/support/temp_dir.h"

using namespace slopecast;
namespace fs = std::filesystem;

namespace {

const char* kGood = R"(
[endpoints]
frames_in = "ipc:///tmp/frames"
[camera]
width_px = 240
height_px = 240
pixel_type = "u16"
[lenslet_grid]
subapertures_x = 16
subapertures_y = 16
pitch_px = 15
[calibration]
min_flux_adu = 250.5
[daemon]
frame_queue_depth = 8
)";

std::string error_of(const std::string& text, const fs::path& base = ".") {
  auto r = io::parse_daemon_config(text, "test.toml", base);
  return std::holds_alternative<io::ConfigError>(r) ? std::get<io::ConfigError>(r).message : "";
}

std::string with(std::string text, const std::string& from, const std::string& to) {
  const auto at = text.find(from);
  REQUIRE(at != std::string::npos);
  return text.replace(at, from.size(), to);
}

}  // namespace

TEST_CASE("a complete config is read with defaults for what it leaves out", "[config]") {
  auto r = io::parse_daemon_config(kGood, "test.toml", ".");
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  const auto& c = std::get<io::DaemonConfig>(r);
  CHECK(c.endpoints.frames_in == "ipc:///tmp/frames");
  CHECK(c.endpoints.control == "tcp://127.0.0.1:10142");  // loopback default
  CHECK(c.pipeline.camera.width_px == 240);
  CHECK(c.pipeline.camera.format == core::PixelFormat::kU16);
  CHECK(c.pipeline.grid.pitch_px == 15);
  CHECK(c.pipeline.grid.origin_x_px == 0);
  CHECK(c.pipeline.min_flux_adu == 250.5);
  CHECK(c.frame_queue_depth == 8);
  CHECK(c.pipeline.dark_adu.empty());
}

TEST_CASE("config mistakes are reported with the table and key", "[config]") {
  CHECK_THAT(error_of(with(kGood, "pitch_px = 15", "pitch_px = 16")), Catch::Contains("does not fit"));
  CHECK_THAT(error_of(with(kGood, "pitch_px = 15", "pitch_px = \"15\"")),
             Catch::Contains("[lenslet_grid] pitch_px: expected an integer"));
  CHECK_THAT(error_of(with(kGood, "pitch_px = 15", "pitch_px = 15\npitch_size = 3")),
             Catch::Contains("unknown key 'pitch_size'"));
  CHECK_THAT(error_of(with(kGood, "\"u16\"", "\"u12\"")), Catch::Contains("'u12' is not one of"));
  CHECK_THAT(error_of(with(kGood, "[camera]", "[kamera]")), Catch::Contains("unknown table or key 'kamera'"));
  CHECK_THAT(error_of(with(kGood, "ipc:///tmp/frames", "localhost:5000")),
             Catch::Contains("has no scheme"));
  CHECK_THAT(error_of(with(kGood, "min_flux_adu = 250.5", "min_flux_adu = -1")),
             Catch::Contains("min_flux_adu: must be >= 0"));
  CHECK_THAT(error_of(with(kGood, "width_px = 240", "width_px = 0")), Catch::Contains("width_px"));
  CHECK_THAT(error_of(with(kGood, "frame_queue_depth = 8", "frame_queue_depth = 0")),
             Catch::Contains("frame_queue_depth"));
  CHECK_THAT(error_of("[camera\nwidth_px = 3"), Catch::Contains("test.toml"));  // TOML syntax
  CHECK_THAT(error_of("[lenslet_grid]\npitch_px = 4\n"), Catch::Contains("missing table [camera]"));
}

TEST_CASE("the dark frame is loaded relative to the config and must fit the camera", "[config]") {
  const slopecast::testing::TempDir tmp;
  const fs::path& dir = tmp.path();
  std::vector<float> dark(240 * 240, 101.5f);
  REQUIRE(io::write_fits_image(dir / "dark.fits", 240, 240, dark).empty());
  REQUIRE(io::write_fits_image(dir / "small.fits", 10, 10, std::vector<float>(100, 1.0f)).empty());
  const std::string text = with(kGood, "min_flux_adu = 250.5", "min_flux_adu = 250.5\ndark_frame = \"dark.fits\"");
  std::ofstream(dir / "slopecastd.toml") << text;

  auto r = io::load_daemon_config(dir / "slopecastd.toml");
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  const auto& c = std::get<io::DaemonConfig>(r);
  CHECK(c.pipeline.dark_adu.size() == 240u * 240u);
  CHECK(c.pipeline.dark_adu[1234] == 101.5f);

  CHECK_THAT(error_of(with(text, "dark.fits", "small.fits"), dir), Catch::Contains("it is 10 x 10 x 1, expected 240 x 240 x 1"));
  CHECK_THAT(error_of(with(text, "dark.fits", "missing.fits"), dir), Catch::Contains("no such file"));
  auto missing = io::load_daemon_config(dir / "nothing.toml");
  CHECK_THAT(std::get<io::ConfigError>(missing).message, Catch::Contains("cannot open config file"));
}

TEST_CASE("the Harrow Vale fixture config is valid once its dark exists", "[config]") {
  // fixtures/harrow_vale/slopecastd.toml names a dark the demo writes; check
  // everything else by pointing it at a fresh dark.
  std::ifstream in(fs::path(SLOPECAST_SOURCE_DIR) / "fixtures/harrow_vale/slopecastd.toml");
  REQUIRE(in);
  const std::string text{std::istreambuf_iterator<char>(in), {}};
  const slopecast::testing::TempDir tmp;
  const fs::path& dir = tmp.path();
  REQUIRE(io::write_fits_image(dir / "harrow_vale_dark.fits", 240, 240, std::vector<float>(240 * 240, 100.0f)).empty());
  auto r = io::parse_daemon_config(text, "harrow_vale", dir);
  INFO((std::holds_alternative<io::ConfigError>(r) ? std::get<io::ConfigError>(r).message : ""));
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  CHECK(std::get<io::DaemonConfig>(r).pipeline.grid.count() == 256);
}

TEST_CASE("the [centroider] table selects the method and its parameters", "[config][centroider]") {
  const std::string text = with(kGood, "[daemon]",
                                "[centroider]\nmethod = \"wcog\"\nweight_sigma_px = 2.5\nweight_follows_spot = true\n"
                                "weight_iterations = 7\nspot_sigma_px = 1\n[daemon]");
  auto r = io::parse_daemon_config(text, "test.toml", ".");
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  const auto& s = std::get<io::DaemonConfig>(r).pipeline.centroider;
  CHECK(s.kind == core::CentroiderKind::kWeighted);
  CHECK(s.weight_sigma_px == 2.5);
  CHECK(s.weight_follows_spot);
  CHECK(s.weight_iterations == 7);
  CHECK(s.spot_sigma_px == 1.0);
  CHECK(s.threshold == 0.2);  // untouched keys keep their defaults
}

TEST_CASE("centroider mistakes are sentences naming the key", "[config][centroider]") {
  auto centroider = [&](const std::string& body) { return error_of(with(kGood, "[daemon]", "[centroider]\n" + body + "\n[daemon]")); };
  CHECK_THAT(centroider("method = \"centre\""), Catch::Contains("[centroider] method: expected one of cog, tcog"));
  CHECK_THAT(centroider("wieght_sigma_px = 2"), Catch::Contains("unknown centroider option 'wieght_sigma_px'"));
  CHECK_THAT(centroider("weight_sigma_px = -1"), Catch::Contains("weight_sigma_px: must be > 0"));
  CHECK_THAT(centroider("weight_iterations = 2.5"), Catch::Contains("weight_iterations: expected a whole number"));
  CHECK_THAT(centroider("weight_follows_spot = 1"), Catch::Contains("expected true or false"));
  CHECK_THAT(centroider("method = \"brightest\"\nbrightest_pixels = 225"),
             Catch::Contains("brightest_pixels 225 must be below the 225 pixels"));
  CHECK_THAT(centroider("method = \"correlation\"\nsearch_px = 7"), Catch::Contains("search_px 7 leaves a template of 1 px"));
  CHECK_THAT(centroider("method = \"correlation\"\ncorrelation_metric = \"sdf\"\npeak_interpolation = \"gaussian\""),
             Catch::Contains("use it with correlation_metric = \"cc\""));
  CHECK_THAT(centroider("method = \"tcog\"\nthreshold = 1.5"), Catch::Contains("must be below 1"));
  CHECK_THAT(centroider("method = \"correlation\"\nreference = \"captured\""), Catch::Contains("exists only live"));
  CHECK_THAT(centroider("method = \"correlation\"\nreference = \"file\""), Catch::Contains("needs reference_file"));
  CHECK_THAT(centroider("threshold = [1, 2]"), Catch::Contains("expected a number, true/false or a string"));
  CHECK_THAT(error_of(with(kGood, "min_flux_adu = 250.5", "min_flux_adu = 250.5\nmin_contrast = 2")),
             Catch::Contains("min_contrast is a contrast 0..1"));
}

TEST_CASE("a correlation reference file is loaded relative to the config and must be one box", "[config][centroider]") {
  const slopecast::testing::TempDir tmp;
  const fs::path& dir = tmp.path();
  std::vector<float> ref(15 * 15, 1.0f);
  REQUIRE(io::write_fits_image(dir / "ref.fits", 15, 15, ref).empty());
  REQUIRE(io::write_fits_image(dir / "wrong.fits", 12, 12, std::vector<float>(144, 1.0f)).empty());
  const std::string text = with(kGood, "[daemon]",
                                "[centroider]\nmethod = \"correlation\"\nreference = \"file\"\n"
                                "reference_file = \"ref.fits\"\n[daemon]");
  std::ofstream(dir / "slopecastd.toml") << text;
  auto r = io::load_daemon_config(dir / "slopecastd.toml");
  INFO((std::holds_alternative<io::ConfigError>(r) ? std::get<io::ConfigError>(r).message : ""));
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  const auto& s = std::get<io::DaemonConfig>(r).pipeline.centroider;
  CHECK(s.reference_size == 15);
  CHECK(s.reference_image.size() == 225u);
  CHECK_THAT(error_of(with(text, "ref.fits", "wrong.fits"), dir), Catch::Contains("the reference image is 12 x 12 px"));
  CHECK_THAT(error_of(with(text, "ref.fits", "gone.fits"), dir), Catch::Contains("reference_file"));
  // Clients reading the config for its geometry do not need the image.
  auto light = io::load_daemon_config(dir / "slopecastd.toml", io::ConfigLoad{.load_images = false});
  CHECK(std::holds_alternative<io::DaemonConfig>(light));
}

TEST_CASE("the Harrow Vale fixture documents every centroider key", "[config][centroider]") {
  std::ifstream in(fs::path(SLOPECAST_SOURCE_DIR) / "fixtures/harrow_vale/slopecastd.toml");
  REQUIRE(in);
  const std::string text{std::istreambuf_iterator<char>(in), {}};
  for (const auto& o : core::kCentroiderOptions) {
    INFO("key " << o.key);
    CHECK(text.find(std::string(o.key) + " =") != std::string::npos);
  }
}

TEST_CASE("the [daemon] performance keys", "[config]") {
  auto r = io::parse_daemon_config(with(kGood, "frame_queue_depth = 8", "frame_queue_depth = 8\nworker_threads = 2\nnewest_frame_only = true"),
                                   "test.toml", ".");
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  CHECK(std::get<io::DaemonConfig>(r).worker_threads == 2);
  CHECK(std::get<io::DaemonConfig>(r).newest_frame_only);
  CHECK_THAT(error_of(with(kGood, "frame_queue_depth = 8", "worker_threads = 0")), Catch::Contains("worker_threads: must be 1..64"));
  CHECK_THAT(error_of(with(kGood, "frame_queue_depth = 8", "newest_frame_only = 1")), Catch::Contains("newest_frame_only: expected true or false"));
}

TEST_CASE("[optics] sets the published slope unit from the optics, with the formula's inputs required",
          "[config][units]") {
  const std::string optics = "[optics]\npixel_size_um = 10\nlenslet_focal_length_mm = 5\nlenslet_pitch_um = 150\n";
  auto unit_of = [&](const std::string& unit) {
    auto r = io::parse_daemon_config(std::string(kGood) + optics + "slope_unit = \"" + unit + "\"\n", "test.toml", ".");
    REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
    return std::get<io::DaemonConfig>(r).units_per_px;
  };
  // Hand-worked: 10 um / 5 mm = 2 mrad per px; times 150 um = 300 nm.
  CHECK(unit_of("px") == 1.0);
  CHECK(unit_of("rad") == Approx(2e-3).epsilon(1e-12));
  CHECK(unit_of("nm") == Approx(300.0).epsilon(1e-12));
  CHECK_THAT(error_of(std::string(kGood) + optics + "slope_unit = \"arcsec\"\n"),
             Catch::Contains("plate_scale_arcsec_per_px"));
  CHECK_THAT(error_of(std::string(kGood) + "[optics]\nslope_unit = \"mrad\"\n"), Catch::Contains("not one of"));
  CHECK_THAT(error_of(std::string(kGood) + "[optics]\nslope_unit = \"rad\"\n"), Catch::Contains("pixel_size_um"));
  CHECK_THAT(error_of(std::string(kGood) + optics + "focal = 3\n"), Catch::Contains("[optics] has an unknown key"));
}

TEST_CASE("valid maps from a pupil and from a FITS mask, and layouts from a file", "[config][calibration]") {
  testing::TempDir dir;
  // Pupil of 240 px centred on the 16 x 16 grid of 15 px: the four corner
  // boxes lie outside it, the 2 x 2 around the centre inside a 25 % hole.
  const std::string pupil = "pupil_centre_x_px = 119.5\npupil_centre_y_px = 119.5\npupil_diameter_px = 240\n"
                            "pupil_obstruction = 0.25\n";
  auto r = io::parse_daemon_config(with(kGood, "[calibration]\n", "[calibration]\n" + pupil), "t.toml", dir.path());
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  const auto& map = std::get<io::DaemonConfig>(r).pipeline.valid_map;
  REQUIRE(map.size() == 256u);
  CHECK(map[0] == 0);
  CHECK(map[15] == 0);
  CHECK(map[7 * 16 + 7] == 0);
  CHECK(map[0 * 16 + 7] == 1);
  CHECK_THAT(error_of(with(kGood, "[calibration]\n", "[calibration]\npupil_obstruction = 0.3\n")),
             Catch::Contains("pupil_diameter_px"));

  // A FITS mask of the grid's shape, combined with the pupil.
  std::vector<float> mask(256, 1.0f);
  mask[0 * 16 + 7] = 0.0f;
  REQUIRE(io::write_fits_image(dir / "mask.fits", 16, 16, mask).empty());
  r = io::parse_daemon_config(with(kGood, "[calibration]\n", "[calibration]\nvalid_map_file = \"mask.fits\"\n" + pupil),
                              "t.toml", dir.path());
  REQUIRE(std::holds_alternative<io::DaemonConfig>(r));
  CHECK(std::get<io::DaemonConfig>(r).pipeline.valid_map[7] == 0);
  REQUIRE(io::write_fits_image(dir / "small.fits", 8, 8, std::vector<float>(64, 1.0f)).empty());
  CHECK_THAT(error_of(with(kGood, "[calibration]\n", "[calibration]\nvalid_map_file = \"small.fits\"\n"), dir.path()),
             Catch::Contains("it is 8 x 8 x 1, expected 16 x 16 x 1"));

  // A hand-written layout table: two boxes for a 2 x 1 grid of 15 px.
  std::ofstream(dir / "boxes.csv") << "x0,y0,width,height,ref_x,ref_y\n10,20,15,15,17.2,27\n40,21,15,15,47,28.5\n";
  const std::string grid = "[lenslet_grid]\nsubapertures_x = 2\nsubapertures_y = 1\npitch_px = 15\n"
                           "layout_file = \"boxes.csv\"\n";
  std::string text = with(kGood, "[lenslet_grid]\nsubapertures_x = 16\nsubapertures_y = 16\npitch_px = 15\n", grid);
  r = io::parse_daemon_config(text, "t.toml", dir.path());
  if (auto* e = std::get_if<io::ConfigError>(&r)) FAIL(e->message);
  CHECK(std::get<io::DaemonConfig>(r).pipeline.layout.size() == 2u);
  CHECK(std::get<io::DaemonConfig>(r).pipeline.layout[1].ref_y == 28.5);
  CHECK_THAT(error_of(with(text, "subapertures_x = 2", "subapertures_x = 3"), dir.path()),
             Catch::Contains("the layout has 2 subapertures, the grid 3 x 1 = 3"));
  CHECK_THAT(error_of(with(text, "pitch_px = 15", "pitch_px = 14"), dir.path()), Catch::Contains("pitch_px = 14"));
  CHECK_THAT(error_of(with(text, "[calibration]\n", "[calibration]\nset = \"x\"\n"), dir.path()),
             Catch::Contains("layout_file cannot be used with it"));
}

// Regression tests for config defects found by an adversarial run (issue
// "Hardening"): each used to crash or be silently accepted.
TEST_CASE("deeply nested or huge config text is refused before the parser sees it", "[config][hardening]") {
  // 10 000 levels of arrays overflowed the parser's stack (SIGSEGV).
  const std::string arrays = std::string(kGood) + "[extra]\nx = " + std::string(10000, '[') + std::string(10000, ']') + "\n";
  CHECK_THAT(error_of(arrays), Catch::Contains("nested more than 32 deep"));
  std::string tables = std::string(kGood) + "[extra]\nx = ";
  for (int k = 0; k < 10000; ++k) tables += "{a = ";
  tables += "1" + std::string(10000, '}') + "\n";
  CHECK_THAT(error_of(tables), Catch::Contains("nested more than 32 deep"));
  // Brackets inside strings and comments do not count.
  CHECK_THAT(error_of(with(kGood, "[daemon]", "# [[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[[\n[daemon]")),
             !Catch::Contains("nested"));
  CHECK_THAT(error_of(std::string(2 << 20, ' ')), Catch::Contains("at most 1048576 bytes"));
}

TEST_CASE("config numbers beyond any meaning and empty paths are refused", "[config][hardening]") {
  CHECK_THAT(error_of(with(kGood, "min_flux_adu = 250.5", "min_flux_adu = 1e400")),
             Catch::Contains("min_flux_adu"));
  CHECK_THAT(error_of(with(kGood, "min_flux_adu = 250.5", "min_flux_adu = inf")), Catch::Contains("finite"));
  CHECK_THAT(error_of(with(kGood, "min_flux_adu = 250.5", "min_flux_adu = nan")), Catch::Contains("finite"));
  CHECK_THAT(error_of(with(kGood, "[calibration]\n", "[calibration]\ndark_frame = \"\"\n")),
             Catch::Contains("dark_frame: is an empty path"));
  CHECK_THAT(error_of(with(kGood, "frame_queue_depth = 8", "frame_queue_depth = 8\nlatency_window_frames = 1000000")),
             Catch::Contains("latency_window_frames: must be 16..65536"));
}

TEST_CASE("a config path that is a directory is named as one", "[config][hardening]") {
  testing::TempDir dir;
  auto r = io::load_daemon_config(dir.path());
  REQUIRE(std::holds_alternative<io::ConfigError>(r));
  CHECK_THAT(std::get<io::ConfigError>(r).message, Catch::Contains("is a directory"));
}

TEST_CASE("config text that is not UTF-8 or holds control characters is refused before the parser",
          "[config][hardening]") {
  // Found by fuzzing (layout_fuzz): these bytes made toml11 3.7 read past
  // the end of its buffer (AddressSanitizer: heap-buffer-overflow in
  // parse_literal_string).
  const std::string crash = "'V\xbf|M\xd1\x99\x8b\x8c\xf3\xee-'V\xbf|\xb3\x0c\x11\xcd";
  CHECK_THAT(error_of(crash), Catch::Contains("not valid UTF-8"));
  CHECK_THAT(error_of(std::string(kGood) + "# a bell \x07\n"), Catch::Contains("control character 0x07"));
  CHECK_THAT(error_of(std::string(kGood) + "# overlong \xc0\xaf\n"), Catch::Contains("not valid UTF-8"));
  CHECK_THAT(error_of(std::string(kGood) + "# surrogate \xed\xa0\x80\n"), Catch::Contains("not valid UTF-8"));
  CHECK_THAT(error_of(std::string(kGood) + "# cut short \xe2\x82"), Catch::Contains("not valid UTF-8"));
  CHECK_THAT(error_of(std::string(kGood) + "# no such lead byte \xf8\x88\x80\x80\n"), Catch::Contains("not valid UTF-8"));
  // Real UTF-8 and CRLF line ends are fine.
  CHECK(error_of(std::string(kGood) + "# Tarn Ridge \xe2\x80\x94 5.5 \xc2\xb5m, \xf0\x9f\x94\xad\r\n").empty());
}

TEST_CASE("the README's configuration reference lists exactly the keys the parser accepts") {
  // Rows of the table under "## Configuration reference":
  // | `[table]` (, `[table]`) | `key` | ...
  std::ifstream in(std::string(SLOPECAST_SOURCE_DIR) + "/README.md");
  REQUIRE(in);
  std::map<std::string, std::set<std::string>> documented;
  bool inside = false;
  for (std::string line; std::getline(in, line);) {
    if (line.rfind("## ", 0) == 0) inside = line == "## Configuration reference";
    if (!inside || line.rfind("| `[", 0) != 0) continue;
    const auto second = line.find(" | ", 2);
    const std::string tables = line.substr(2, second - 2);
    const auto key_start = line.find('`', second) + 1;
    const std::string key = line.substr(key_start, line.find('`', key_start) - key_start);
    for (std::size_t at = tables.find("`["); at != std::string::npos; at = tables.find("`[", at + 1))
      documented[tables.substr(at + 2, tables.find("]`", at) - at - 2)].insert(key);
  }
  const auto accepted = io::accepted_config_keys();
  CHECK(documented.size() >= 10);
  for (const auto& [table, keys] : accepted)
    for (const auto& key : keys) {
      INFO("[" << table << "] " << key << " is accepted but not in the README's reference");
      CHECK(documented[table].count(key) == 1);
    }
  for (const auto& [table, keys] : documented)
    for (const auto& key : keys) {
      INFO("[" << table << "] " << key << " is documented but the parser does not accept it");
      CHECK(accepted.count(table) == 1);
      if (accepted.count(table)) CHECK(accepted.at(table).count(key) == 1);
    }
}
