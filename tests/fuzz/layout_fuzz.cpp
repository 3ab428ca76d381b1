// Fuzz target: a hand-written layout CSV and a calibration manifest.
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <string>

#include "daemon/io/calibration_set.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  namespace fs = std::filesystem;
  static const fs::path dir = "/tmp/slopecast-layout-fuzz-" + std::to_string(getpid());
  static const bool made = fs::create_directories(dir) || fs::exists(dir);
  (void)made;
  for (const char* name : {"layout.csv", "calibration.toml"})
    if (FILE* f = std::fopen((dir / name).c_str(), "wb")) {
      std::fwrite(data, 1, size, f);
      std::fclose(f);
    }
  (void)slopecast::io::read_layout_file(dir / "layout.csv");
  (void)slopecast::io::load_calibration_set(dir, slopecast::core::CameraSpec{64, 64, slopecast::core::PixelFormat::kU16});
  return 0;
}
