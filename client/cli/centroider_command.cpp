// `slopecast centroider`: show or change the daemon's centroider while it
// runs. Without options it shows the settings in force; --method and --set
// change them (checked as a whole by the daemon and applied between two
// frames, or refused with the running settings unchanged);
// --capture-reference takes a correlation reference from the live frames.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/control_client.h"
#include "daemon/core/centroid/centroider_settings.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "centroider";

struct CentroiderOptions {
  KeyOptions keys;
  std::string config;
  std::string control = io::kDefaultControlEndpoint;
  std::string method;
  std::vector<std::string> set;
  bool capture_reference = false;
  bool shadow = false, shadow_off = false;
  bool json = false;
  double timeout_s = 2.0;
};

void run_centroider(CentroiderOptions o) {
  zmq::context_t ctx(1);
  const auto connection = connect_control(kCmd, ctx, o.config, o.control, o.keys);
  if (!connection) return;
  v1::ControlRequest request;
  auto* set = request.mutable_set_centroider();
  if (!o.method.empty()) io::to_wire("method", core::OptionValue(o.method), *set->add_options());
  for (const std::string& a : o.set) {
    const auto kv = core::parse_option_assignment(a);
    if (!kv) return fail(kCmd, fmt::format("--set '{}': expected key=value, e.g. --set weight_sigma_px=2", a));
    io::to_wire(kv->first, kv->second, *set->add_options());
  }
  set->set_capture_reference(o.capture_reference);
  set->set_shadow(o.shadow);
  set->set_shadow_off(o.shadow_off);
  const auto reply = call_daemon(kCmd, *connection, request, o.timeout_s, " (the running settings are unchanged)");
  if (!reply) return;
  const v1::CentroiderReply& c = reply->centroider();
  if (o.json) return print_json(kCmd, c);
  if (o.shadow_off) {
    std::cout << "shadow centroider stopped\n";
    return;
  }
  if (o.shadow) {
    std::cout << fmt::format("shadow {} {}\n  (beside the live centroider; its statistics are on the insight topic "
                             "\"shadow\", and in `slopecast watch --config`)\n",
                             c.changed() ? "now" : "in force:", c.summary());
  } else {
    std::cout << fmt::format("{} {}\n  settings generation {}{}\n", c.changed() ? "now" : "in force:", c.summary(),
                             c.settings_generation(), c.changed() ? " (measurements from the next frame on)" : "");
  }
  std::cout << "  every option:\n";
  for (const auto& opt : c.options()) {
    const auto value = io::from_wire(opt);
    std::cout << fmt::format("    {:<22} {}\n", opt.key(), value ? core::format_option(*value) : "-");
  }
}

}  // namespace

void add_centroider_command(CLI::App& app) {
  auto opts = std::make_shared<CentroiderOptions>();
  std::string keys;
  for (const auto& opt : core::kCentroiderOptions) keys += fmt::format("\n  {:<22} {}", opt.key, opt.help);
  auto* cmd = app.add_subcommand("centroider", "Show or change slopecastd's centroider while it runs");
  cmd->footer("Options for --set (the keys of the daemon config's [centroider] table):" + keys);
  auto* config = cmd->add_option("--config", opts->config, "Take the control endpoint from this slopecastd config file")
                     ->check(CLI::ExistingFile);
  cmd->add_option("--control", opts->control, "Daemon control endpoint")->capture_default_str()->excludes(config);
  cmd->add_option("--method", opts->method, "Switch to this method (the tuned options of the others are kept)");
  cmd->add_option("--set", opts->set, "key=value: change one option (repeat for several); see below");
  cmd->add_flag("--capture-reference", opts->capture_reference,
                "Take the mean of the valid spots of the last measured frame as the correlation reference");
  auto* shadow = cmd->add_flag("--shadow", opts->shadow,
                                "Show or change the shadow centroider instead (run beside the live one on the same "
                                "frames, off the hot path; needs [insight]): judge a method without switching it in");
  cmd->add_flag("--shadow-off", opts->shadow_off, "Stop the shadow centroider")->excludes(shadow);
  cmd->add_flag("--json", opts->json, "Print the reply as JSON (field names as in control.proto)");
  cmd->add_option("--timeout-s", opts->timeout_s, "Seconds to wait for the reply")
      ->capture_default_str()->check(CLI::PositiveNumber);
  add_key_options(cmd, opts->keys);
  cmd->callback([opts] { run_centroider(*opts); });
}

}  // namespace slopecast::cli
