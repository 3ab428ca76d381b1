// `slopecast keys NAME`: a CURVE key pair for a daemon with [security] or
// for one of its clients, made by ZeroMQ's zmq_curve_keypair: NAME.key
// (public and secret, readable by its owner only) and NAME.pub (the public
// part, to hand to the other side: the daemon's clients file lists its
// clients' public keys; each client is given the daemon's NAME.pub).
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <zmq.h>

#include "client/cli/commands.h"
#include "daemon/io/curve_keys.h"

namespace slopecast::cli {

namespace {
constexpr const char* kCmd = "keys";

void run_keys(const std::string& name, bool force) {
  const std::string key_file = name + ".key", pub_file = name + ".pub";
  if (!force && (std::filesystem::exists(key_file) || std::filesystem::exists(pub_file)))
    return fail(kCmd, fmt::format("{} or {} exists; pass --force to replace it", key_file, pub_file));
  if (!zmq_has("curve")) return fail(kCmd, "this ZeroMQ library was built without CURVE");
  char pub[41] = {}, sec[41] = {};
  if (zmq_curve_keypair(pub, sec) != 0) return fail(kCmd, "zmq_curve_keypair failed");
  if (auto e = io::write_key_file(key_file, {pub, sec}); !e.empty()) return fail(kCmd, e);
  if (auto e = io::write_key_file(pub_file, {pub, ""}); !e.empty()) return fail(kCmd, e);
  std::cout << fmt::format(
      "wrote {} (keep it private) and {}\npublic key: {}\nfor the daemon's clients file:\n"
      "  [[client]]\n  name = \"{}\"\n  public = \"{}\"\n  role = \"read\"   # or \"change\"\n",
      key_file, pub_file, pub, std::filesystem::path(name).filename().string(), pub);
}
}  // namespace

void add_keys_command(CLI::App& app) {
  auto name = std::make_shared<std::string>();
  auto force = std::make_shared<bool>(false);
  auto* cmd = app.add_subcommand("keys", "Make a CURVE key pair (NAME.key, NAME.pub) for [security]");
  cmd->add_option("name", *name, "Path and name of the pair, e.g. keys/loop-operator")->required();
  cmd->add_flag("--force", *force, "Replace existing files");
  cmd->callback([name, force] { run_keys(*name, *force); });
}

}  // namespace slopecast::cli
