#include <iostream>

#include <google/protobuf/util/json_util.h>

#include "client/cli/commands.h"
#include "daemon/io/curve_keys.h"
#include "daemon/io/endpoint.h"

namespace slopecast::cli {

void fail(const char* command, const std::string& why) {
  std::cerr << "slopecast " << command << ": " << why << "\n";
  exit_code() = 2;
}

bool endpoint_ok(const char* command, const char* option, const std::string& endpoint) {
  if (auto e = io::validate_endpoint(endpoint); !e.empty()) {
    fail(command, std::string(option) + ": " + e);
    return false;
  }
  return true;
}

std::optional<io::DaemonConfig> read_daemon_config(const char* command, const std::string& path, io::ConfigLoad what) {
  auto r = io::load_daemon_config(path, what);
  if (auto* e = std::get_if<io::ConfigError>(&r)) {
    fail(command, "--config: " + e->message);
    return std::nullopt;
  }
  return std::get<io::DaemonConfig>(std::move(r));
}

void print_json(const char* command, const google::protobuf::Message& message) {
  std::string text;
  google::protobuf::util::JsonPrintOptions options;
  options.add_whitespace = true;
  options.always_print_primitive_fields = true;
  options.preserve_proto_field_names = true;
  if (!google::protobuf::util::MessageToJsonString(message, &text, options).ok()) {
    std::cerr << "slopecast " << command << ": the reply could not be written as JSON\n";
    exit_code() = 1;
    return;
  }
  std::cout << text;
}

std::optional<std::string> resolve_control(const char* command, const std::string& config_path,
                                           const std::string& control) {
  std::string endpoint = control;
  if (!config_path.empty()) {
    auto c = read_daemon_config(command, config_path);
    if (!c) return std::nullopt;
    endpoint = c->endpoints.control;
  }
  if (!endpoint_ok(command, "--control", endpoint)) return std::nullopt;
  return endpoint;
}

std::optional<v1::ControlReply> call_daemon(const char* command, client::ControlClient& control,
                                            const v1::ControlRequest& request, double timeout_s,
                                            const char* refused_suffix) {
  auto result = control.call(request, std::chrono::milliseconds(static_cast<long>(timeout_s * 1000)));
  if (auto* err = std::get_if<std::string>(&result)) {
    if (stop_requested()) return std::nullopt;
    std::cerr << "slopecast " << command << ": " << *err << "\n";
    exit_code() = 1;
    return std::nullopt;
  }
  auto& reply = std::get<v1::ControlReply>(result);
  if (!reply.ok()) {
    std::cerr << "slopecast " << command << ": refused: " << reply.error() << refused_suffix << "\n";
    exit_code() = 1;
    return std::nullopt;
  }
  return std::move(reply);
}

void add_key_options(CLI::App* cmd, KeyOptions& keys) {
  auto* c = cmd->add_option("--client-key", keys.client_key,
                            "This client's CURVE key pair file (`slopecast keys`), for a daemon with [security]")
                ->check(CLI::ExistingFile);
  auto* s = cmd->add_option("--server-key", keys.server_key, "The daemon's public key file, with --client-key")
                ->check(CLI::ExistingFile);
  c->needs(s);
  s->needs(c);
}

std::unique_ptr<client::ControlClient> connect_control(const char* command, zmq::context_t& ctx,
                                                       const std::string& config_path, const std::string& control,
                                                       const KeyOptions& keys) {
  const auto endpoint = resolve_control(command, config_path, control);
  if (!endpoint) return nullptr;
  std::optional<client::CurveClient> curve;
  if (!load_keys(command, keys, curve)) return nullptr;
  return std::make_unique<client::ControlClient>(ctx, *endpoint, curve);
}

bool load_keys(const char* command, const KeyOptions& keys, std::optional<client::CurveClient>& out) {
  out.reset();
  if (keys.client_key.empty()) return true;
  auto mine = io::read_key_file(keys.client_key, true);
  if (auto* e = std::get_if<std::string>(&mine)) {
    fail(command, "--client-key: " + *e);
    return false;
  }
  auto server = io::read_key_file(keys.server_key, false);
  if (auto* e = std::get_if<std::string>(&server)) {
    fail(command, "--server-key: " + *e);
    return false;
  }
  const auto& m = std::get<io::CurveKeyPair>(mine);
  out = client::CurveClient{std::get<io::CurveKeyPair>(server).public_z85, m.public_z85, m.secret_z85};
  return true;
}

}  // namespace slopecast::cli
