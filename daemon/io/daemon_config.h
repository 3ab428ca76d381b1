// slopecastd's configuration file (TOML) and what it turns into.
//
// load_daemon_config() reads and checks the whole file once, at startup;
// anything it returns is valid and the rest of the daemon never re-checks.
// Unknown tables or keys are errors (a misspelt key must not silently fall
// back to a default on a telescope). Relative file paths are taken relative
// to the config file's directory.
#pragma once

#include <filesystem>
#include <optional>
#include <string>
#include <variant>

#include "daemon/core/pipeline.h"

namespace slopecast::io {

struct Endpoints {
  // Where the camera (or `slopecast sim`) publishes frames; the daemon connects.
  std::string frames_in = "tcp://127.0.0.1:6110";
  // Where the daemon publishes measurements; the daemon binds.
  std::string measurements_out = "tcp://127.0.0.1:6111";
  // Control request/reply; the daemon binds.
  std::string control = "tcp://127.0.0.1:6112";
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
  // Dark frame path as resolved (empty: none). The pixels are in pipeline.dark_adu.
  std::filesystem::path dark_frame;
  core::PipelineSettings pipeline;
};

struct ConfigError {
  std::string message;  // one or more lines naming the file, key and problem
};

// Parses, checks and (if configured) loads the dark frame.
std::variant<DaemonConfig, ConfigError> load_daemon_config(const std::filesystem::path& file);

// The same, from TOML text; base_dir resolves relative paths.
std::variant<DaemonConfig, ConfigError> parse_daemon_config(const std::string& toml_text,
                                                            const std::string& source_name,
                                                            const std::filesystem::path& base_dir);

// Empty when endpoint is a ZeroMQ endpoint slopecast accepts (tcp://, ipc://,
// inproc://); otherwise why not.
std::string validate_endpoint(const std::string& endpoint);

}  // namespace slopecast::io
