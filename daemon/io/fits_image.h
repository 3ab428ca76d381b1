// FITS files (FITS Standard 4.0) through cfitsio: 2-D images and 3-D cubes
// in the primary HDU, and binary tables in an extension.
//
// Axis convention: NAXIS1 is x (columns, varies fastest), NAXIS2 is y (rows),
// NAXIS3 the plane (a frame of a cube), so pixels[(z * height + y) * width +
// x] is FITS pixel (x+1, y+1, z+1). Any BITPIX is read and converted to
// float, with BSCALE/BZERO applied by cfitsio. Writers choose the on-disk
// type: BITPIX -32 (IEEE float) for calibration frames, 8 for maps, and 16
// with BZERO = 32768 for unsigned 16-bit camera frames (Standard 4.0, sec.
// 5.3: the unsigned-integer convention).
//
// Every write goes to "<path>.partial" and is renamed over the target when
// complete, so a reader never sees a half-written file and a failed write
// (or a kill) leaves the old file in place.
#pragma once

#include <cstdint>
#include <filesystem>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <utility>
#include <variant>
#include <vector>

#include "daemon/core/frame/pixel_format.h"

namespace slopecast::io {

struct FitsImage {
  int width = 0;   // NAXIS1
  int height = 0;  // NAXIS2
  std::vector<float> pixels;  // row-major, width * height
};

struct FitsCube {
  int width = 0, height = 0, planes = 1;  // NAXIS1..3 (planes 1 for a 2-D image)
  std::vector<float> pixels;              // plane after plane
};

struct FitsError {
  std::string message;  // names the file and cfitsio's reason
};

// A header card written after the mandatory ones.
struct FitsCard {
  std::string keyword;  // <= 8 characters, upper case
  std::variant<double, long long, std::string> value;
  std::string comment;
};

enum class FitsPixel { kF32, kU16, kU8 };

// What goes in the header besides the data's own cards.
struct FitsHeader {
  std::vector<FitsCard> cards;
  std::vector<std::string> history;  // one HISTORY card (or more, wrapped) per entry
};

// The size a reader expects, checked against the header before any pixel
// is read (a wrong 16384 x 16384 file is refused, not loaded).
struct FitsShape {
  int width = 0, height = 0, planes = 1;
};

// The primary HDU must hold a 2-D image (a 3-D image with NAXIS3 = 1 is
// accepted too). NaN or infinite pixels are refused, and so are integer
// pixels marked undefined by BLANK: a calibration frame with holes must be
// repaired, not silently used.
std::variant<FitsImage, FitsError> read_fits_image(const std::filesystem::path& path,
                                                   std::optional<FitsShape> expect = std::nullopt);

// A 2-D image (planes = 1) or a 3-D cube from the primary HDU; refusals as
// above.
std::variant<FitsCube, FitsError> read_fits_cube(const std::filesystem::path& path,
                                                 std::optional<FitsShape> expect = std::nullopt);

// Writes (replacing any existing file) a BITPIX = -32 primary image.
// Returns an empty string on success, otherwise the reason.
std::string write_fits_image(const std::filesystem::path& path, int width, int height,
                             std::span<const float> pixels, std::span<const FitsCard> cards = {},
                             const std::string& history = {});

// Writes a primary image of `planes` planes (NAXIS = 2 when planes is 1)
// stored as `pixel`; values must fit the type (0..255 or 0..65535 whole
// numbers for the integer types: checked, refused otherwise).
std::string write_fits_cube(const std::filesystem::path& path, int width, int height, int planes,
                            std::span<const float> pixels, FitsPixel pixel, const FitsHeader& header = {});

// A binary-table column: integers are written as TFORM 'K' (64-bit), reals
// as 'D' (double).
struct FitsColumn {
  std::string name;
  bool integer = false;
  std::string unit;  // TUNITn, may be empty
  std::vector<double> values;
};

struct FitsTable {
  long rows = 0;
  std::vector<FitsColumn> columns;
  const FitsColumn* find(const std::string& name) const;
};

// Writes an empty primary HDU (carrying `header`) and one binary-table
// extension named extname holding the columns (all the same length).
std::string write_fits_table(const std::filesystem::path& path, const std::string& extname,
                             std::span<const FitsColumn> columns, const FitsHeader& header = {});

// Reads every column of the binary-table extension named extname; numeric
// columns only, non-finite values refused.
std::variant<FitsTable, FitsError> read_fits_table(const std::filesystem::path& path, const std::string& extname);

// Camera frames as a cube in their own pixel type (no conversion through
// float): u8 as BITPIX 8, u16 as BITPIX 16 with BZERO 32768, u32 as BITPIX 32
// with BZERO 2147483648, f32 as BITPIX -32. pixels are little-endian, plane
// after plane. When columns is not empty, a binary-table extension named
// extname follows the cube (one row per plane, typically seq and times).
std::string write_fits_frames(const std::filesystem::path& path, int width, int height, int planes,
                              core::PixelFormat format, std::span<const std::byte> pixels,
                              const FitsHeader& header = {}, const std::string& extname = {},
                              std::span<const FitsColumn> columns = {});

// Reads a cube plane by plane as camera frames (for replay): BITPIX 8 -> u8;
// 16 with BZERO 32768 -> u16; 32 with BZERO 2147483648 -> u32; signed 16 and
// 32 -> u16 and u32 (a negative pixel is refused when its plane is read);
// -32 and -64 -> f32. BLANK pixels are refused.
class FitsFrameReader {
 public:
  static std::variant<std::unique_ptr<FitsFrameReader>, FitsError> open(const std::filesystem::path& path);
  ~FitsFrameReader();
  FitsFrameReader(const FitsFrameReader&) = delete;
  FitsFrameReader& operator=(const FitsFrameReader&) = delete;

  int width() const { return width_; }
  int height() const { return height_; }
  long planes() const { return planes_; }
  int bitpix() const { return bitpix_; }
  core::PixelFormat format() const { return format_; }
  // Plane z (0-based) into out (width x height pixels of format(),
  // little-endian). Empty on success, otherwise the reason.
  std::string read_plane(long z, std::span<std::byte> out);

 private:
  FitsFrameReader() = default;
  std::filesystem::path path_;
  void* file_ = nullptr;  // fitsfile*
  int width_ = 0, height_ = 0, bitpix_ = 0;
  long planes_ = 0;
  bool signed_ = false;
  core::PixelFormat format_ = core::PixelFormat::kU16;
  std::vector<double> wide_;
};

}  // namespace slopecast::io
