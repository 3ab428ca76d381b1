#include "daemon/io/fits_image.h"

#include <cmath>
#include <functional>
#include <limits>
#include <memory>

#include <fitsio.h>
#include <fmt/format.h>

namespace slopecast::io {

namespace {

constexpr long kMaxSide = 16384;
constexpr long kMaxPlanes = 1000000;

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

// Runs `write` on a fresh file at "<path>.partial", then renames it over
// path. `write` returns cfitsio's reason on failure.
std::string atomic_write(const std::filesystem::path& path, const std::string& what,
                         const std::function<std::string(fitsfile*)>& write) {
  auto fail = [&](const std::string& why) { return fmt::format("cannot write FITS {} '{}': {}", what, path.string(), why); };
  std::filesystem::path tmp = path;
  tmp += ".partial";
  std::error_code ec;
  std::filesystem::remove(tmp, ec);
  int status = 0;
  fitsfile* raw = nullptr;
  if (fits_create_diskfile(&raw, tmp.c_str(), &status)) return fail(fits_reason(status));
  FitsHandle f(raw);
  std::string error = write(f.get());
  if (error.empty() && fits_close_file(f.release(), &status)) error = fits_reason(status);
  if (!error.empty()) {
    f.reset();
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

std::string write_header(fitsfile* f, const FitsHeader& h) {
  int status = 0;
  for (const FitsCard& c : h.cards) {
    if (const auto* d = std::get_if<double>(&c.value)) {
      double v = *d;
      fits_update_key(f, TDOUBLE, c.keyword.c_str(), &v, c.comment.c_str(), &status);
    } else if (const auto* i = std::get_if<long long>(&c.value)) {
      LONGLONG v = *i;
      fits_update_key(f, TLONGLONG, c.keyword.c_str(), &v, c.comment.c_str(), &status);
    } else {
      fits_update_key_str(f, c.keyword.c_str(), std::get<std::string>(c.value).c_str(), c.comment.c_str(), &status);
    }
    if (status) return fmt::format("header card {}: {}", c.keyword, fits_reason(status));
  }
  for (const std::string& line : h.history)
    if (fits_write_history(f, line.c_str(), &status)) return fits_reason(status);
  return {};
}

using FitsOpen = std::variant<FitsHandle, std::string>;
FitsOpen open_read(const std::filesystem::path& path) {
  if (!std::filesystem::exists(path)) return std::string("no such file");
  int status = 0;
  fitsfile* raw = nullptr;
  // The "diskfile" calls take the name literally: brackets and other
  // characters are not read as cfitsio's extended-filename syntax.
  if (fits_open_diskfile(&raw, path.c_str(), READONLY, &status)) return fits_reason(status);
  return FitsHandle(raw);
}

}  // namespace

const FitsColumn* FitsTable::find(const std::string& name) const {
  for (const FitsColumn& c : columns)
    if (c.name == name) return &c;
  return nullptr;
}

std::variant<FitsCube, FitsError> read_fits_cube(const std::filesystem::path& path, std::optional<FitsShape> expect) {
  auto fail = [&](const std::string& why) {
    return FitsError{fmt::format("cannot read FITS image '{}': {}", path.string(), why)};
  };
  auto opened = open_read(path);
  if (auto* e = std::get_if<std::string>(&opened)) return fail(*e);
  FitsHandle f = std::move(std::get<FitsHandle>(opened));
  int status = 0, bitpix = 0, naxis = 0;
  long naxes[3] = {0, 0, 1};
  if (fits_get_img_param(f.get(), 3, &bitpix, &naxis, naxes, &status)) return fail(fits_reason(status));
  if (naxis != 2 && naxis != 3) return fail(fmt::format("expected a 2-D image or a 3-D cube, found NAXIS = {}", naxis));
  if (naxis == 2) naxes[2] = 1;
  if (naxes[0] < 1 || naxes[1] < 1 || naxes[0] > kMaxSide || naxes[1] > kMaxSide || naxes[2] < 1 ||
      naxes[2] > kMaxPlanes)
    return fail(fmt::format("size {} x {} x {} is out of range", naxes[0], naxes[1], naxes[2]));
  if (expect && (naxes[0] != expect->width || naxes[1] != expect->height || naxes[2] != expect->planes))
    return fail(fmt::format("it is {} x {} x {}, expected {} x {} x {}", naxes[0], naxes[1], naxes[2], expect->width,
                            expect->height, expect->planes));
  FitsCube c;
  c.width = static_cast<int>(naxes[0]);
  c.height = static_cast<int>(naxes[1]);
  c.planes = static_cast<int>(naxes[2]);
  c.pixels.resize(static_cast<std::size_t>(c.width) * c.height * c.planes);
  long first[3] = {1, 1, 1};
  int any_null = 0;
  // Undefined pixels (BLANK in integer images) come back as NaN and are
  // refused below with the other non-finite ones.
  float undefined = std::numeric_limits<float>::quiet_NaN();
  if (fits_read_pix(f.get(), TFLOAT, first, static_cast<LONGLONG>(c.pixels.size()), &undefined, c.pixels.data(),
                    &any_null, &status))
    return fail(fits_reason(status));
  const std::size_t plane = static_cast<std::size_t>(c.width) * c.height;
  for (std::size_t i = 0; i < c.pixels.size(); ++i)
    if (!std::isfinite(c.pixels[i]))
      return fail(fmt::format("pixel ({}, {}) of plane {} is not a finite number (NaN, infinite or undefined)", i % plane % c.width,
                              i % plane / c.width, i / plane));
  return c;
}

std::variant<FitsImage, FitsError> read_fits_image(const std::filesystem::path& path, std::optional<FitsShape> expect) {
  auto cube = read_fits_cube(path, expect);
  if (auto* e = std::get_if<FitsError>(&cube)) return *e;
  FitsCube& c = std::get<FitsCube>(cube);
  if (c.planes != 1)
    return FitsError{fmt::format("cannot read FITS image '{}': expected a 2-D image, found a cube of {} planes",
                                 path.string(), c.planes)};
  return FitsImage{c.width, c.height, std::move(c.pixels)};
}

std::string write_fits_cube(const std::filesystem::path& path, int width, int height, int planes,
                            std::span<const float> pixels, FitsPixel pixel, const FitsHeader& header) {
  auto refuse = [&](const std::string& why) { return fmt::format("cannot write FITS image '{}': {}", path.string(), why); };
  if (width < 1 || height < 1 || planes < 1 || width > kMaxSide || height > kMaxSide || planes > kMaxPlanes ||
      pixels.size() != static_cast<std::size_t>(width) * height * planes)
    return refuse(fmt::format("{} pixels do not make a {} x {} x {} image", pixels.size(), width, height, planes));
  if (pixel != FitsPixel::kF32) {
    const float top = pixel == FitsPixel::kU8 ? 255.0f : 65535.0f;
    for (float v : pixels)
      if (!(v >= 0.0f && v <= top && v == std::floor(v)))
        return refuse(fmt::format("value {} is not a whole number 0..{} for an unsigned {}-bit image", v, top,
                                  pixel == FitsPixel::kU8 ? 8 : 16));
  } else {
    for (float v : pixels)
      if (!std::isfinite(v)) return refuse("a pixel is NaN or infinite");
  }
  return atomic_write(path, "image", [&](fitsfile* f) -> std::string {
    int status = 0;
    long naxes[3] = {width, height, planes};
    // USHORT_IMG: cfitsio writes BITPIX = 16 with BZERO = 32768, BSCALE = 1.
    const int type = pixel == FitsPixel::kF32 ? FLOAT_IMG : pixel == FitsPixel::kU16 ? USHORT_IMG : BYTE_IMG;
    if (fits_create_img(f, type, planes == 1 ? 2 : 3, naxes, &status)) return fits_reason(status);
    if (auto e = write_header(f, header); !e.empty()) return e;
    long first[3] = {1, 1, 1};
    if (fits_write_pix(f, TFLOAT, first, static_cast<LONGLONG>(pixels.size()), const_cast<float*>(pixels.data()),
                       &status))
      return fits_reason(status);
    return {};
  });
}

std::string write_fits_image(const std::filesystem::path& path, int width, int height,
                             std::span<const float> pixels, std::span<const FitsCard> cards,
                             const std::string& history) {
  FitsHeader h;
  h.cards.assign(cards.begin(), cards.end());
  if (!history.empty()) h.history.push_back(history);
  return write_fits_cube(path, width, height, 1, pixels, FitsPixel::kF32, h);
}

std::string write_fits_table(const std::filesystem::path& path, const std::string& extname,
                             std::span<const FitsColumn> columns, const FitsHeader& header) {
  if (columns.empty()) return fmt::format("cannot write FITS table '{}': no columns", path.string());
  const std::size_t rows = columns[0].values.size();
  for (const FitsColumn& c : columns)
    if (c.values.size() != rows)
      return fmt::format("cannot write FITS table '{}': column {} has {} rows, {} has {}", path.string(), c.name,
                         c.values.size(), columns[0].name, rows);
  return atomic_write(path, "table", [&](fitsfile* f) -> std::string {
    int status = 0;
    if (fits_create_img(f, BYTE_IMG, 0, nullptr, &status)) return fits_reason(status);
    if (auto e = write_header(f, header); !e.empty()) return e;
    std::vector<std::string> names, forms, units;
    for (const FitsColumn& c : columns) {
      names.push_back(c.name);
      forms.push_back(c.integer ? "1K" : "1D");
      units.push_back(c.unit);
    }
    std::vector<char*> n, t, u;
    for (std::size_t k = 0; k < columns.size(); ++k) {
      n.push_back(names[k].data());
      t.push_back(forms[k].data());
      u.push_back(units[k].data());
    }
    if (fits_create_tbl(f, BINARY_TBL, static_cast<LONGLONG>(rows), static_cast<int>(columns.size()), n.data(),
                        t.data(), u.data(), extname.c_str(), &status))
      return fits_reason(status);
    for (std::size_t k = 0; k < columns.size(); ++k) {
      if (rows == 0) break;
      if (columns[k].integer) {
        std::vector<LONGLONG> v(rows);
        for (std::size_t r = 0; r < rows; ++r) v[r] = static_cast<LONGLONG>(std::llround(columns[k].values[r]));
        fits_write_col(f, TLONGLONG, static_cast<int>(k + 1), 1, 1, static_cast<LONGLONG>(rows), v.data(), &status);
      } else {
        fits_write_col(f, TDOUBLE, static_cast<int>(k + 1), 1, 1, static_cast<LONGLONG>(rows),
                       const_cast<double*>(columns[k].values.data()), &status);
      }
      if (status) return fmt::format("column {}: {}", columns[k].name, fits_reason(status));
    }
    return {};
  });
}

std::variant<FitsTable, FitsError> read_fits_table(const std::filesystem::path& path, const std::string& extname) {
  auto fail = [&](const std::string& why) {
    return FitsError{fmt::format("cannot read FITS table '{}' (extension {}): {}", path.string(), extname, why)};
  };
  auto opened = open_read(path);
  if (auto* e = std::get_if<std::string>(&opened)) return fail(*e);
  FitsHandle f = std::move(std::get<FitsHandle>(opened));
  int status = 0;
  if (fits_movnam_hdu(f.get(), BINARY_TBL, const_cast<char*>(extname.c_str()), 0, &status))
    return fail("no binary table of that name");
  long rows = 0;
  int ncols = 0;
  if (fits_get_num_rows(f.get(), &rows, &status) || fits_get_num_cols(f.get(), &ncols, &status))
    return fail(fits_reason(status));
  if (rows < 0 || rows > 100000000) return fail(fmt::format("{} rows is out of range", rows));
  FitsTable t;
  t.rows = rows;
  for (int k = 1; k <= ncols; ++k) {
    char name[FLEN_VALUE] = {}, key[FLEN_KEYWORD] = {};
    fits_make_keyn("TTYPE", k, key, &status);
    fits_read_key(f.get(), TSTRING, key, name, nullptr, &status);
    int typecode = 0;
    long repeat = 0, width = 0;
    fits_get_coltype(f.get(), k, &typecode, &repeat, &width, &status);
    if (status) return fail(fits_reason(status));
    if (typecode == TSTRING || typecode == TLOGICAL || repeat != 1)
      return fail(fmt::format("column {} is not a scalar number", name));
    FitsColumn c;
    c.name = name;
    c.integer = typecode == TLONGLONG || typecode == TLONG || typecode == TINT || typecode == TSHORT ||
                typecode == TBYTE;
    c.values.resize(static_cast<std::size_t>(rows));
    int any_null = 0;
    if (rows > 0 &&
        fits_read_col(f.get(), TDOUBLE, k, 1, 1, rows, nullptr, c.values.data(), &any_null, &status))
      return fail(fmt::format("column {}: {}", name, fits_reason(status)));
    for (double v : c.values)
      if (!std::isfinite(v)) return fail(fmt::format("column {} holds a NaN or infinite value", name));
    t.columns.push_back(std::move(c));
  }
  return t;
}

}  // namespace slopecast::io
