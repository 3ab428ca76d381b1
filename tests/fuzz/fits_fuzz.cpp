// Fuzz target: a FITS file's bytes, read as an image or cube and as a
// layout table (cfitsio underneath, our checks on top).
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <string>

#include "daemon/io/fits_image.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  static const std::string path = "/tmp/slopecast-fits-fuzz-" + std::to_string(getpid()) + ".fits";
  if (FILE* f = std::fopen(path.c_str(), "wb")) {
    std::fwrite(data, 1, size, f);
    std::fclose(f);
  }
  (void)slopecast::io::read_fits_cube(path);
  (void)slopecast::io::read_fits_table(path, "LAYOUT");
  return 0;
}
