#include "daemon/io/fits_image.h"

#include <cmath>
#include <cstring>
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

namespace {

// Appends a binary-table HDU named extname holding the columns (all the
// same length, checked by the caller).
std::string write_table_hdu(fitsfile* f, const std::string& extname, std::span<const FitsColumn> columns) {
  int status = 0;
  const std::size_t rows = columns.empty() ? 0 : columns[0].values.size();
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
}

std::string check_columns(const std::filesystem::path& path, std::span<const FitsColumn> columns) {
  if (columns.empty()) return fmt::format("cannot write FITS table '{}': no columns", path.string());
  const std::size_t rows = columns[0].values.size();
  for (const FitsColumn& c : columns)
    if (c.values.size() != rows)
      return fmt::format("cannot write FITS table '{}': column {} has {} rows, {} has {}", path.string(), c.name,
                         c.values.size(), columns[0].name, rows);
  return {};
}

}  // namespace

std::string write_fits_table(const std::filesystem::path& path, const std::string& extname,
                             std::span<const FitsColumn> columns, const FitsHeader& header) {
  if (auto e = check_columns(path, columns); !e.empty()) return e;
  return atomic_write(path, "table", [&](fitsfile* f) -> std::string {
    int status = 0;
    if (fits_create_img(f, BYTE_IMG, 0, nullptr, &status)) return fits_reason(status);
    if (auto e = write_header(f, header); !e.empty()) return e;
    return write_table_hdu(f, extname, columns);
  });
}

std::string write_fits_frames(const std::filesystem::path& path, int width, int height, int planes,
                              core::PixelFormat format, std::span<const std::byte> pixels, const FitsHeader& header,
                              const std::string& extname, std::span<const FitsColumn> columns) {
  auto refuse = [&](const std::string& why) { return fmt::format("cannot write FITS cube '{}': {}", path.string(), why); };
  const std::size_t bpp = core::bytes_per_pixel(format);
  if (width < 1 || height < 1 || planes < 1 || width > kMaxSide || height > kMaxSide || planes > kMaxPlanes ||
      pixels.size() != static_cast<std::size_t>(width) * height * planes * bpp)
    return refuse(fmt::format("{} bytes do not make a {} x {} x {} cube of {}", pixels.size(), width, height, planes,
                              core::pixel_format_name(format)));
  if (!columns.empty())
    if (auto e = check_columns(path, columns); !e.empty()) return e;
  return atomic_write(path, "cube", [&](fitsfile* f) -> std::string {
    int status = 0;
    long naxes[3] = {width, height, planes};
    // cfitsio writes the unsigned types with the Standard's BZERO offsets:
    // USHORT_IMG as BITPIX 16 + BZERO 32768, ULONG_IMG as BITPIX 32 + BZERO
    // 2147483648 (FITS Standard 4.0, table 11).
    int img = BYTE_IMG, type = TBYTE;
    switch (format) {
      case core::PixelFormat::kU8: img = BYTE_IMG; type = TBYTE; break;
      case core::PixelFormat::kU16: img = USHORT_IMG; type = TUSHORT; break;
      case core::PixelFormat::kU32: img = ULONG_IMG; type = TUINT; break;
      case core::PixelFormat::kF32: img = FLOAT_IMG; type = TFLOAT; break;
    }
    if (fits_create_img(f, img, planes == 1 ? 2 : 3, naxes, &status)) return fits_reason(status);
    if (auto e = write_header(f, header); !e.empty()) return e;
    long first[3] = {1, 1, 1};
    // The bytes are little-endian (the wire's order) and so is this host
    // (x86-64); cfitsio swaps to the file's big-endian order itself.
    if (fits_write_pix(f, type, first, static_cast<LONGLONG>(pixels.size() / bpp),
                       const_cast<std::byte*>(pixels.data()), &status))
      return fits_reason(status);
    if (!columns.empty()) return write_table_hdu(f, extname, columns);
    return {};
  });
}

std::variant<std::unique_ptr<FitsFrameReader>, FitsError> FitsFrameReader::open(const std::filesystem::path& path) {
  auto fail = [&](const std::string& why) {
    return FitsError{fmt::format("cannot read FITS cube '{}': {}", path.string(), why)};
  };
  auto opened = open_read(path);
  if (auto* e = std::get_if<std::string>(&opened)) return fail(*e);
  auto r = std::unique_ptr<FitsFrameReader>(new FitsFrameReader());
  r->path_ = path;
  r->file_ = std::get<FitsHandle>(opened).release();
  fitsfile* f = static_cast<fitsfile*>(r->file_);
  int status = 0, bitpix = 0, naxis = 0;
  long naxes[3] = {0, 0, 1};
  if (fits_get_img_param(f, 3, &bitpix, &naxis, naxes, &status)) return fail(fits_reason(status));
  if (naxis != 2 && naxis != 3) return fail(fmt::format("expected a 2-D image or a 3-D cube, found NAXIS = {}", naxis));
  if (naxis == 2) naxes[2] = 1;
  if (naxes[0] < 1 || naxes[1] < 1 || naxes[0] > kMaxSide || naxes[1] > kMaxSide || naxes[2] < 1 ||
      naxes[2] > kMaxPlanes)
    return fail(fmt::format("size {} x {} x {} is out of range", naxes[0], naxes[1], naxes[2]));
  int equivalent = 0;
  if (fits_get_img_equivtype(f, &equivalent, &status)) return fail(fits_reason(status));
  r->bitpix_ = bitpix;
  switch (equivalent) {
    case BYTE_IMG: r->format_ = core::PixelFormat::kU8; break;
    case SHORT_IMG:  // signed 16-bit: replayed as u16, refused plane by plane if a pixel is negative
    case USHORT_IMG: r->format_ = core::PixelFormat::kU16; break;
    case LONG_IMG:   // signed 32-bit: as u32, negatives refused
    case ULONG_IMG: r->format_ = core::PixelFormat::kU32; break;
    case FLOAT_IMG:
    case DOUBLE_IMG: r->format_ = core::PixelFormat::kF32; break;
    default:
      return fail(fmt::format("BITPIX {} (equivalent type {}) has no camera pixel type; slopecast reads 8, 16, 32 "
                              "(signed or with the unsigned BZERO), -32 and -64",
                              bitpix, equivalent));
  }
  r->signed_ = equivalent == SHORT_IMG || equivalent == LONG_IMG;
  r->width_ = static_cast<int>(naxes[0]);
  r->height_ = static_cast<int>(naxes[1]);
  r->planes_ = naxes[2];
  return r;
}

FitsFrameReader::~FitsFrameReader() {
  if (file_) FitsCloser{}(static_cast<fitsfile*>(file_));
}

std::string FitsFrameReader::read_plane(long z, std::span<std::byte> out) {
  auto fail = [&](const std::string& why) {
    return fmt::format("cannot read plane {} of FITS cube '{}': {}", z, path_.string(), why);
  };
  const std::size_t n = static_cast<std::size_t>(width_) * height_;
  if (z < 0 || z >= planes_) return fail(fmt::format("the cube has {} planes", planes_));
  if (out.size() != n * core::bytes_per_pixel(format_)) return fail("wrong buffer size");
  fitsfile* f = static_cast<fitsfile*>(file_);
  int status = 0, any_null = 0;
  long first[3] = {1, 1, z + 1};
  if (signed_ || format_ == core::PixelFormat::kF32) {
    // Read wide, check, then narrow: negatives (signed types) and values a
    // float cannot hold (DOUBLE) are refused rather than wrapped.
    wide_.resize(n);
    if (fits_read_pix(f, TDOUBLE, first, static_cast<LONGLONG>(n), nullptr, wide_.data(), &any_null, &status))
      return fail(fits_reason(status));
    if (any_null) return fail("it has undefined (BLANK) pixels");
    for (std::size_t i = 0; i < n; ++i) {
      const double v = wide_[i];
      if (format_ == core::PixelFormat::kF32) {
        if (!std::isfinite(v) || std::fabs(v) > std::numeric_limits<float>::max())
          return fail(fmt::format("pixel ({}, {}) = {} is not a finite float", i % width_, i / width_, v));
        const float x = static_cast<float>(v);
        std::memcpy(out.data() + 4 * i, &x, 4);
      } else if (v < 0) {
        return fail(fmt::format("pixel ({}, {}) = {} is negative; camera pixels are unsigned", i % width_,
                                i / width_, v));
      } else if (format_ == core::PixelFormat::kU16) {
        const auto x = static_cast<std::uint16_t>(v);
        std::memcpy(out.data() + 2 * i, &x, 2);
      } else {
        const auto x = static_cast<std::uint32_t>(v);
        std::memcpy(out.data() + 4 * i, &x, 4);
      }
    }
    return {};
  }
  const int type = format_ == core::PixelFormat::kU8 ? TBYTE : format_ == core::PixelFormat::kU16 ? TUSHORT : TUINT;
  if (fits_read_pix(f, type, first, static_cast<LONGLONG>(n), nullptr, out.data(), &any_null, &status))
    return fail(fits_reason(status));
  if (any_null) return fail("it has undefined (BLANK) pixels");
  return {};
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
