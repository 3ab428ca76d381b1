// Reading and writing single 2-D images as FITS (FITS Standard 4.0), through
// cfitsio.
//
// Axis convention: NAXIS1 is x (columns, varies fastest), NAXIS2 is y (rows),
// so pixels[y * width + x] is FITS pixel (x+1, y+1). Any BITPIX is read and
// converted to float, with BSCALE/BZERO applied by cfitsio. Images are written
// as BITPIX = -32 (IEEE float), the natural type for calibration frames.
#pragma once

#include <filesystem>
#include <span>
#include <string>
#include <utility>
#include <variant>
#include <vector>

namespace slopecast::io {

struct FitsImage {
  int width = 0;   // NAXIS1
  int height = 0;  // NAXIS2
  std::vector<float> pixels;  // row-major, width * height
};

struct FitsError {
  std::string message;  // names the file and cfitsio's reason
};

// The primary HDU must hold a 2-D image (a 3-D image with NAXIS3 = 1 is
// accepted too). NaN or infinite pixels are refused: a calibration frame with
// holes must be repaired, not silently used.
std::variant<FitsImage, FitsError> read_fits_image(const std::filesystem::path& path);

// Extra header cards written after the mandatory ones: (keyword, comment).
struct FitsCard {
  std::string keyword;  // <= 8 characters, upper case
  double value = 0.0;
  std::string comment;
};

// Writes (replacing any existing file) a BITPIX = -32 primary image.
// Returns an empty string on success, otherwise the reason.
std::string write_fits_image(const std::filesystem::path& path, int width, int height,
                             std::span<const float> pixels, std::span<const FitsCard> cards = {},
                             const std::string& history = {});

}  // namespace slopecast::io
