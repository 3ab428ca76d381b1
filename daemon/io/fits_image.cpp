#include "daemon/io/fits_image.h"

#include <cmath>
#include <memory>

#include <fitsio.h>
#include <fmt/format.h>

namespace slopecast::io {

namespace {

std::string fits_reason(int status) {
  char text[FLEN_STATUS] = {};
  fits_get_errstatus(status, text);
  return fmt::format("{} (cfitsio status {})", text, status);
}

struct FitsCloser {
  void operator()(fitsfile* f) const {
    int status = 0;
    fits_close_file(f, &status);
  }
};
using FitsHandle = std::unique_ptr<fitsfile, FitsCloser>;

// Writes the whole file at tmp; returns cfitsio's reason on failure.
std::string write_fits_file(const std::filesystem::path& tmp, int width, int height,
                            std::span<const float> pixels, std::span<const FitsCard> cards,
                            const std::string& history) {
  int status = 0;
  fitsfile* raw = nullptr;
  if (fits_create_diskfile(&raw, tmp.c_str(), &status)) return fits_reason(status);
  FitsHandle f(raw);
  long naxes[2] = {width, height};
  if (fits_create_img(f.get(), FLOAT_IMG, 2, naxes, &status)) return fits_reason(status);
  for (const FitsCard& c : cards) {
    double v = c.value;
    if (fits_update_key(f.get(), TDOUBLE, c.keyword.c_str(), &v, c.comment.c_str(), &status))
      return fits_reason(status);
  }
  if (!history.empty() && fits_write_history(f.get(), history.c_str(), &status)) return fits_reason(status);
  long first[2] = {1, 1};
  if (fits_write_pix(f.get(), TFLOAT, first, static_cast<LONGLONG>(pixels.size()),
                     const_cast<float*>(pixels.data()), &status))
    return fits_reason(status);
  if (fits_close_file(f.release(), &status)) return fits_reason(status);
  return {};
}

}  // namespace

std::variant<FitsImage, FitsError> read_fits_image(const std::filesystem::path& path) {
  auto fail = [&](const std::string& why) {
    return FitsError{fmt::format("cannot read FITS image '{}': {}", path.string(), why)};
  };
  if (!std::filesystem::exists(path)) return fail("no such file");
  int status = 0;
  fitsfile* raw = nullptr;
  // The "diskfile" calls take the name literally: brackets and other
  // characters are not read as cfitsio's extended-filename syntax.
  if (fits_open_diskfile(&raw, path.c_str(), READONLY, &status)) return fail(fits_reason(status));
  FitsHandle f(raw);
  int bitpix = 0, naxis = 0;
  long naxes[3] = {0, 0, 0};
  if (fits_get_img_param(f.get(), 3, &bitpix, &naxis, naxes, &status)) return fail(fits_reason(status));
  if (naxis != 2 && !(naxis == 3 && naxes[2] == 1))
    return fail(fmt::format("expected a 2-D image, found NAXIS = {}", naxis));
  if (naxes[0] < 1 || naxes[1] < 1 || naxes[0] > 16384 || naxes[1] > 16384)
    return fail(fmt::format("image size {} x {} is out of range", naxes[0], naxes[1]));
  FitsImage img;
  img.width = static_cast<int>(naxes[0]);
  img.height = static_cast<int>(naxes[1]);
  img.pixels.resize(static_cast<std::size_t>(img.width) * img.height);
  long first[3] = {1, 1, 1};
  int any_null = 0;
  if (fits_read_pix(f.get(), TFLOAT, first, static_cast<LONGLONG>(img.pixels.size()), nullptr,
                    img.pixels.data(), &any_null, &status))
    return fail(fits_reason(status));
  for (std::size_t i = 0; i < img.pixels.size(); ++i)
    if (!std::isfinite(img.pixels[i]))
      return fail(fmt::format("pixel ({}, {}) is not a finite number", i % img.width, i / img.width));
  return img;
}

std::string write_fits_image(const std::filesystem::path& path, int width, int height,
                             std::span<const float> pixels, std::span<const FitsCard> cards,
                             const std::string& history) {
  auto fail = [&](const std::string& why) {
    return fmt::format("cannot write FITS image '{}': {}", path.string(), why);
  };
  if (width < 1 || height < 1 || pixels.size() != static_cast<std::size_t>(width) * height)
    return fail(fmt::format("{} pixels do not make a {} x {} image", pixels.size(), width, height));
  // Write beside the target and rename over it, so a reader never sees a
  // half-written calibration file and a failed write leaves the old one.
  std::filesystem::path tmp = path;
  tmp += ".partial";
  std::error_code ec;
  std::filesystem::remove(tmp, ec);
  const std::string error = write_fits_file(tmp, width, height, pixels, cards, history);
  if (!error.empty()) {
    std::filesystem::remove(tmp, ec);
    return fail(error);
  }
  std::filesystem::rename(tmp, path, ec);
  if (ec) {
    std::filesystem::remove(tmp, ec);
    return fail("cannot rename the finished file into place: " + ec.message());
  }
  return {};
}

}  // namespace slopecast::io
