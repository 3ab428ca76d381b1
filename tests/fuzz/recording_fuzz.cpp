// Fuzz target: a recording file's bytes (daemon/io/recording.h), read
// record by record to the end, and by index when it has one: damage must be
// reported, never crash the reader or make it loop.
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <string>

#include "daemon/io/recording.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  static const std::string path = "/tmp/slopecast-recording-fuzz-" + std::to_string(getpid()) + ".screc";
  if (FILE* f = std::fopen(path.c_str(), "wb")) {
    std::fwrite(data, 1, size, f);
    std::fclose(f);
  }
  auto opened = slopecast::io::RecordingReader::open(path);
  if (auto* r = std::get_if<std::unique_ptr<slopecast::io::RecordingReader>>(&opened)) {
    slopecast::io::RecordedMessage m;
    std::size_t steps = 0;
    while ((*r)->next(m) != slopecast::io::ReadOutcome::kEnd)
      if (++steps > size + 16) __builtin_trap();  // every step consumes at least a byte
    if ((*r)->indexed() && (*r)->seek(0)) (void)(*r)->next(m);
  }
  return 0;
}
