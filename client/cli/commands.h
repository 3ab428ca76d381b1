// The `slopecast` tool's subcommands. Each add_*_command() registers its
// options on the parent CLI11 app and sets a callback that runs it; each
// command is a thin layer over client/lib and client/sim.
#pragma once

#include <memory>
#include <optional>
#include <string>

#include <CLI/CLI.hpp>
#include <google/protobuf/message.h>

#include "client/lib/control_client.h"
#include "daemon/io/daemon_config.h"

namespace slopecast::cli {

// Exit code a command leaves in; main returns it.
int& exit_code();

void add_sim_command(CLI::App& app);
void add_watch_command(CLI::App& app);
void add_status_command(CLI::App& app);
void add_centroider_command(CLI::App& app);
void add_roundtrip_command(CLI::App& app);
void add_calibrate_command(CLI::App& app);
void add_register_command(CLI::App& app);
void add_keys_command(CLI::App& app);
void add_record_command(CLI::App& app);
void add_replay_command(CLI::App& app);
void add_export_command(CLI::App& app);
void add_snap_command(CLI::App& app);
void add_eval_command(CLI::App& app);

// --client-key / --server-key, for a daemon running with [security].
struct KeyOptions {
  std::string client_key;  // this client's key pair file
  std::string server_key;  // the daemon's public key file
};
void add_key_options(CLI::App* cmd, KeyOptions& keys);
// resolve_control + load_keys + a ControlClient on the result: the control
// connection every command that talks to the daemon opens. nullptr when the
// command has failed (the reason is printed).
std::unique_ptr<client::ControlClient> connect_control(const char* command, zmq::context_t& ctx,
                                                       const std::string& config_path, const std::string& control,
                                                       const KeyOptions& keys);

// The CURVE keys to connect with (nullopt inside when none were given).
// On a bad or missing file fails the command and returns false.
bool load_keys(const char* command, const KeyOptions& keys, std::optional<client::CurveClient>& out);

// The command line as typed (argv joined by spaces), for provenance.
const std::string& invocation();
void set_invocation(int argc, char** argv);

// True once SIGINT or SIGTERM has arrived (installed by main).
bool stop_requested();
// 128 + the signal that asked to stop.
int stopped_exit_code();

// Prints "slopecast <command>: why" to stderr and sets exit code 2.
void fail(const char* command, const std::string& why);

// The endpoint check every command shares (daemon/io/endpoint.h); on a bad
// endpoint it fails the command with the sentence and returns false.
bool endpoint_ok(const char* command, const char* option, const std::string& endpoint);

// The control endpoint a command talks to: from --config when given
// (read_daemon_config), else --control; checked. On error fails the command
// and returns nullopt.
std::optional<std::string> resolve_control(const char* command, const std::string& config_path,
                                           const std::string& control);

// Prints a reply as JSON (protobuf's JSON mapping, field names as in the
// .proto, every field shown) for scripts; on failure fails the command.
void print_json(const char* command, const google::protobuf::Message& message);

// One control request. On a transport error or a refusal prints why
// ("slopecast <command>: refused: <error><refused_suffix>"), sets exit code
// 1 and returns nullopt (quietly when a signal interrupted the wait).
std::optional<v1::ControlReply> call_daemon(const char* command, client::ControlClient& control,
                                            const v1::ControlRequest& request, double timeout_s,
                                            const char* refused_suffix = "");

// A slopecastd config read for its camera, grid and endpoints (by default
// its dark and other images are not loaded: they may not exist yet; eval
// asks for everything the daemon loads). On error fails the command.
std::optional<io::DaemonConfig> read_daemon_config(const char* command, const std::string& path,
                                                  io::ConfigLoad what = {.load_images = false});

}  // namespace slopecast::cli
