// Fuzz target: a config file's text, parsed and checked as slopecastd and
// every `slopecast --config` do (without loading images).
#include <cstdint>
#include <string>

#include "daemon/io/daemon_config.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string text(reinterpret_cast<const char*>(data), size);
  (void)slopecast::io::parse_daemon_config(text, "fuzz.toml", "/nonexistent",
                                           slopecast::io::ConfigLoad{.load_images = false});
  return 0;
}
