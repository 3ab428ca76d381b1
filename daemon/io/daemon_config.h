// slopecastd's configuration file (TOML) and what it turns into.
//
// load_daemon_config() reads and checks the whole file once, at startup;
// anything it returns is valid and the rest of the daemon never re-checks.
// Unknown tables or keys are errors (a misspelt key must not silently fall
// back to a default on a telescope). Relative file paths are taken relative
// to the config file's directory.
#pragma once

#include <filesystem>
#include <map>
#include <set>
#include <optional>
#include <string>
#include <variant>
#include <vector>

#include "daemon/core/calibration/slope_units.h"
#include "daemon/core/calibration/valid_map.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/calibration_set.h"
#include "daemon/io/curve_keys.h"
#include "daemon/io/endpoint.h"

namespace slopecast::io {

struct Endpoints {
  // Where the camera (or `slopecast sim`) publishes frames; the camera binds
  // a PUB (or XPUB) socket there and the daemon connects its SUB.
  std::string frames_in = kDefaultFramesEndpoint;
  // Where the daemon publishes measurements; the daemon binds.
  std::string measurements_out = kDefaultMeasurementsEndpoint;
  // Control request/reply; the daemon binds.
  std::string control = kDefaultControlEndpoint;
  // Insight reports (modes, turbulence, noise, shadow, preview); the daemon
  // binds it when [insight] enabled = true.
  std::string insight_out = kDefaultInsightEndpoint;
};

// [insight] and [shadow]: what the daemon works out beside the hot path,
// on its own thread (daemon/app/insight_worker.h).
struct InsightSettings {
  bool enabled = false;
  double report_rate_hz = 2.0;       // modes, turbulence, noise and shadow reports per second
  int window_frames = 1000;          // rolling window for r0, noise and shadow statistics
  int zernike_max_noll = 15;         // modes j = 2..this
  double telescope_diameter_m = 0;   // the pupil's diameter in the telescope; 0: no r0 (refused with the reason)
  double outer_scale_m = 25;         // L0 assumed by the r0 estimators
  double sensing_wavelength_nm = 0;  // for r0 and seeing at the sensing wavelength (0: 500 nm only)
  double strehl_wavelength_nm = 0;   // Strehl estimate at this wavelength (0: none)
  bool loop_closed = false;          // residual slopes: r0 refused
  double preview_rate_hz = 1.0;      // preview frames per second (0: none)
  int preview_max_side_px = 512;     // larger frames are binned down by a whole factor
  bool shadow = false;               // a [shadow] table is present
  core::CentroiderSettings shadow_centroider;
};

struct DaemonConfig {
  Endpoints endpoints;
  // Frames queued in the daemon's socket before newer frames are dropped
  // (ZeroMQ receive high-water mark, in messages). Small: a loop controller
  // wants the newest frame, not a backlog.
  int frame_queue_depth = 4;
  // Measurements queued per subscriber before newer ones are dropped for
  // that subscriber (ZeroMQ send high-water mark, in messages).
  int measurement_queue_depth = 64;
  // Frames over which the status latency median/p99 are computed.
  int latency_window_frames = 4096;
  // No frame for this long turns the status health from "ok" to "stale".
  double stale_after_s = 1.0;
  // A forward seq jump larger than this is taken as a camera restart (or a
  // corrupt header), not as that many missed frames.
  std::uint64_t max_seq_jump = 100000;
  // Largest frame message part ZeroMQ accepts, bytes. A larger one makes
  // ZeroMQ drop the connection; the daemon counts that and reconnects.
  // 0 in the file means the default: 2 x the configured frame + 64 KiB.
  std::int64_t max_frame_bytes = 0;
  // Threads that measure a frame (the loop thread and worker_threads - 1
  // helpers, each taking a band of subaperture rows). 1 for small sensors;
  // more only helps when a frame's measurement is the bottleneck (80 x 80
  // subapertures and up) and cores are free.
  int worker_threads = 1;
  // What happens when frames arrive faster than they are measured. false
  // (default): every frame is measured in order; ZeroMQ drops frames that
  // arrive while frame_queue_depth are already queued -- the newest -- so a
  // backlog ages by up to that many frames. true: the newest frame wins --
  // whenever another frame is already queued the current one is skipped
  // (counted in frames_skipped), so a loop always gets the freshest frame.
  bool newest_frame_only = false;
  // A name for this sensor, carried by every measurement and status reply,
  // so that one subscriber can tell several daemons' streams apart.
  std::string sensor_name;
  // Dark frame path as resolved (empty: none). The pixels are in pipeline.dark_adu.
  std::filesystem::path dark_frame;
  // Calibration set loaded at start ([calibration] set; empty: none), and
  // the folder live save/load requests name their sets in
  // ([calibration] calibration_dir, default "calibrations" beside the
  // config file).
  std::filesystem::path calibration_set;
  std::filesystem::path calibration_dir;
  // Layout table given by hand ([lenslet_grid] layout_file; empty: none).
  std::filesystem::path layout_file;
  // From the calibration set: the registration's lattice (when it made the
  // layout) and each product's provenance, kept for the next save.
  std::optional<core::LatticeFit> lattice;
  std::map<std::string, Provenance> calibration_made;
  // CURVE security on the daemon's bound endpoints ([security]): enabled
  // when a server key is configured; then only the listed clients connect,
  // and only those with role "change" may change anything.
  bool curve = false;
  CurveKeyPair server_keys;
  std::vector<ClientKey> clients;
  // Published slope unit and the optics that convert to it ([optics]).
  core::SlopeUnit slope_unit = core::SlopeUnit::kPx;
  core::SlopeOptics optics;
  double units_per_px = 1.0;
  // The config file's folder: relative paths, in the file and in live
  // control requests (reference_file), are taken from here.
  std::filesystem::path base_dir;
  core::PipelineSettings pipeline;
  InsightSettings insight;
  // The pupil on the camera ([calibration] pupil_*), when given.
  std::optional<core::PupilSpec> pupil;
  // Legal but probably wrong (no dark, a host that does not resolve, a
  // deaf frames endpoint ...): printed by --check-config, logged at start.
  std::vector<std::string> warnings;
};

struct ConfigError {
  std::string message;  // one or more lines naming the file, key and problem
};

// What to load besides the text. Clients that read a daemon's config for its
// geometry and endpoints (slopecast sim/watch/status --config) skip the dark
// and the correlation reference image, which may not exist yet.
struct ConfigLoad {
  bool load_images = true;
};

// For reference = "file": resolves reference_file against base_dir and
// loads it into s.reference_image (one box, pitch x pitch px). Empty on
// success (or when there is nothing to load), otherwise why not.
std::string load_reference_image(core::CentroiderSettings& s, const std::filesystem::path& base_dir);

// Parses, checks and (if configured and asked) loads the dark frame, the
// calibration set, the layout file and the valid-map file.
std::variant<DaemonConfig, ConfigError> load_daemon_config(const std::filesystem::path& file,
                                                           ConfigLoad what = {});

// The same, from TOML text; base_dir resolves relative paths.
std::variant<DaemonConfig, ConfigError> parse_daemon_config(const std::string& toml_text,
                                                            const std::string& source_name,
                                                            const std::filesystem::path& base_dir,
                                                            ConfigLoad what = {});

// Every key the config parser accepts, by table ("endpoints", "camera",
// ...): what the configuration reference in the README must list.
std::map<std::string, std::set<std::string>> accepted_config_keys();

}  // namespace slopecast::io
