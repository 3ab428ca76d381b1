#include "daemon/core/centroid/centroider_settings.h"

#include <algorithm>
#include <array>
#include <charconv>
#include <cmath>

#include <fmt/format.h>

namespace slopecast::core {

namespace {

constexpr std::array kOptions = {
    CentroiderOption{"method", "all",
                     "cog | tcog | wcog | brightest | correlation | quad_cell | gaussian_fit (default cog)"},
    CentroiderOption{"spot_sigma_px", "wcog, correlation, quad_cell, gaussian_fit",
                     "expected rms width of a spot, px, > 0 (default 1.5)"},
    CentroiderOption{"threshold_mode", "tcog",
                     "relative (fraction of the window peak) | absolute (ADU above the background) "
                     "(default relative)"},
    CentroiderOption{"threshold", "tcog",
                     "subtracted from every pixel, the rest count as 0; relative: 0..1, absolute: ADU >= 0 "
                     "(default 0.2)"},
    CentroiderOption{"weight_sigma_px", "wcog", "rms width of the Gaussian weight, px, > 0 (default 2)"},
    CentroiderOption{"weight_follows_spot", "wcog",
                     "true: iterate the weight's centre onto the spot; false: keep it at the zero point "
                     "(default false)"},
    CentroiderOption{"weight_iterations", "wcog", "most iterations when following, 1..50 (default 10)"},
    CentroiderOption{"weight_tolerance_px", "wcog",
                     "stop following once a step is below this, px, > 0 (default 0.001)"},
    CentroiderOption{"brightest_pixels", "brightest",
                     "pixels kept, 1..box pixels - 1; the next brightest is subtracted (default 20)"},
    CentroiderOption{"correlation_metric", "correlation",
                     "cc (cross-correlation, maximum) | sdf (square difference) | adf (absolute difference) "
                     "| adf2 (adf squared) (default sdf)"},
    CentroiderOption{"peak_interpolation", "correlation",
                     "parabola (1-D, per axis) | quadratic_ls (2-D least squares, 3x3) | gaussian (3-point, "
                     "cc only) (default quadratic_ls)"},
    CentroiderOption{"search_px", "correlation",
                     "largest shift tried each way, px, 1..; the box must keep a template of >= 3 px "
                     "(default 2)"},
    CentroiderOption{"reference", "correlation",
                     "gaussian (of spot_sigma_px) | file (reference_file) | captured (mean of valid spots, "
                     "on request; live only) (default gaussian)"},
    CentroiderOption{"reference_file", "correlation",
                     "FITS image of one box (pitch x pitch px) for reference = file; relative to the config"},
    CentroiderOption{"fit_max_iterations", "gaussian_fit", "most Levenberg-Marquardt steps, 1..1000 (default 30)"},
    CentroiderOption{"fit_tolerance_px", "gaussian_fit",
                     "converged once a step moves the spot by less than this, px, > 0 (default 0.0001)"},
    CentroiderOption{"adu_per_electron", "gaussian_fit",
                     "camera gain for the fit's noise model, ADU per e-, >= 0; 0 weighs pixels alike "
                     "(default 1)"},
};

struct Named {
  std::string_view name;
  int value;
};
constexpr std::array kMethodNames = {Named{"cog", 0},         Named{"tcog", 1},        Named{"wcog", 2},
                                     Named{"brightest", 3},   Named{"correlation", 4}, Named{"quad_cell", 5},
                                     Named{"gaussian_fit", 6}};
constexpr std::array kThresholdNames = {Named{"relative", 0}, Named{"absolute", 1}};
constexpr std::array kMetricNames = {Named{"cc", 0}, Named{"sdf", 1}, Named{"adf", 2}, Named{"adf2", 3}};
constexpr std::array kInterpNames = {Named{"parabola", 0}, Named{"quadratic_ls", 1}, Named{"gaussian", 2}};
constexpr std::array kReferenceNames = {Named{"gaussian", 0}, Named{"file", 1}, Named{"captured", 2}};

template <std::size_t N>
std::string_view name_of(const std::array<Named, N>& names, int v) {
  for (const Named& n : names)
    if (n.value == v) return n.name;
  return "?";
}

template <std::size_t N>
std::string choices(const std::array<Named, N>& names) {
  std::string out;
  for (const Named& n : names) out += fmt::format("{}{}", out.empty() ? "" : ", ", n.name);
  return out;
}


// Typed readers: each returns an error sentence or sets out.
std::string read_number(std::string_view key, const OptionValue& v, double lo, double hi, bool lo_open,
                        double& out) {
  const double* d = std::get_if<double>(&v);
  if (!d) return fmt::format("{}: expected a number, got {}", key, format_option(v));
  const bool ok = std::isfinite(*d) && (lo_open ? *d > lo : *d >= lo) && *d <= hi;
  if (!ok)
    return fmt::format("{}: must be {} {}{}, got {}", key, lo_open ? ">" : ">=", lo,
                       std::isfinite(hi) ? fmt::format(" and <= {}", hi) : std::string(), *d);
  out = *d;
  return {};
}

std::string read_int(std::string_view key, const OptionValue& v, int lo, int hi, int& out) {
  const double* d = std::get_if<double>(&v);
  if (!d || *d != std::floor(*d)) return fmt::format("{}: expected a whole number, got {}", key, format_option(v));
  if (*d < lo || *d > hi) return fmt::format("{}: must be {}..{}, got {}", key, lo, hi, *d);
  out = static_cast<int>(*d);
  return {};
}

std::string read_bool(std::string_view key, const OptionValue& v, bool& out) {
  const bool* b = std::get_if<bool>(&v);
  if (!b) return fmt::format("{}: expected true or false, got {}", key, format_option(v));
  out = *b;
  return {};
}

template <typename E, std::size_t N>
std::string read_enum(std::string_view key, const OptionValue& v, const std::array<Named, N>& names, E& out) {
  const std::string* s = std::get_if<std::string>(&v);
  if (s)
    for (const Named& n : names)
      if (n.name == *s) {
        out = static_cast<E>(n.value);
        return {};
      }
  return fmt::format("{}: expected one of {}, got {}", key, choices(names), format_option(v));
}

constexpr double kInf = HUGE_VAL;

// Whether a "methods" list ("all" or "a, b, c") names this method.
bool reads(std::string_view methods, std::string_view method) {
  if (methods == "all") return true;
  while (!methods.empty()) {
    const auto comma = methods.find(", ");
    if (methods.substr(0, comma) == method) return true;
    if (comma == std::string_view::npos) break;
    methods.remove_prefix(comma + 2);
  }
  return false;
}

}  // namespace

const std::span<const CentroiderOption> kCentroiderOptions(kOptions);

std::string format_option(const OptionValue& v) {
  if (const double* d = std::get_if<double>(&v)) return fmt::format("{}", *d);
  if (const bool* b = std::get_if<bool>(&v)) return *b ? "true" : "false";
  return fmt::format("\"{}\"", std::get<std::string>(v));
}

std::string_view centroider_name(CentroiderKind kind) { return name_of(kMethodNames, static_cast<int>(kind)); }

std::optional<CentroiderKind> parse_centroider(std::string_view name) {
  for (const Named& n : kMethodNames)
    if (n.name == name) return static_cast<CentroiderKind>(n.value);
  return std::nullopt;
}

std::string apply_option(CentroiderSettings& s, std::string_view key, const OptionValue& v) {
  if (key == "method") return read_enum(key, v, kMethodNames, s.kind);
  if (key == "spot_sigma_px") return read_number(key, v, 0.0, 1000.0, true, s.spot_sigma_px);
  if (key == "threshold_mode") return read_enum(key, v, kThresholdNames, s.threshold_mode);
  if (key == "threshold") return read_number(key, v, 0.0, kInf, false, s.threshold);
  if (key == "weight_sigma_px") return read_number(key, v, 0.0, 1000.0, true, s.weight_sigma_px);
  if (key == "weight_follows_spot") return read_bool(key, v, s.weight_follows_spot);
  if (key == "weight_iterations") return read_int(key, v, 1, 50, s.weight_iterations);
  if (key == "weight_tolerance_px") return read_number(key, v, 0.0, 1.0, true, s.weight_tolerance_px);
  if (key == "brightest_pixels") return read_int(key, v, 1, 1 << 20, s.brightest_pixels);
  if (key == "correlation_metric") return read_enum(key, v, kMetricNames, s.metric);
  if (key == "peak_interpolation") return read_enum(key, v, kInterpNames, s.interpolation);
  if (key == "search_px") return read_int(key, v, 1, 512, s.search_px);
  if (key == "reference") return read_enum(key, v, kReferenceNames, s.reference);
  if (key == "reference_file") {
    const std::string* p = std::get_if<std::string>(&v);
    if (!p) return fmt::format("reference_file: expected a path, got {}", format_option(v));
    s.reference_file = *p;
    return {};
  }
  if (key == "fit_max_iterations") return read_int(key, v, 1, 1000, s.fit_max_iterations);
  if (key == "fit_tolerance_px") return read_number(key, v, 0.0, 1.0, true, s.fit_tolerance_px);
  if (key == "adu_per_electron") return read_number(key, v, 0.0, 1e6, false, s.adu_per_electron);
  std::string keys;
  for (const CentroiderOption& o : kOptions) keys += fmt::format("{}{}", keys.empty() ? "" : ", ", o.key);
  return fmt::format("unknown centroider option '{}' (known: {})", key, keys);
}

OptionValue parse_option_value(std::string_view value) {
  if (value == "true" || value == "false") return OptionValue(value == "true");
  double number = 0.0;
  const auto [end, ec] = std::from_chars(value.data(), value.data() + value.size(), number);
  if (ec == std::errc() && end == value.data() + value.size() && !value.empty()) return OptionValue(number);
  if (value.size() >= 2 && value.front() == '"' && value.back() == '"') value = value.substr(1, value.size() - 2);
  return OptionValue(std::string(value));
}

std::optional<std::pair<std::string, OptionValue>> parse_option_assignment(std::string_view text) {
  const auto eq = text.find('=');
  if (eq == std::string_view::npos || eq == 0) return std::nullopt;
  return std::pair{std::string(text.substr(0, eq)), parse_option_value(text.substr(eq + 1))};
}

std::vector<std::pair<std::string, OptionValue>> list_options(const CentroiderSettings& s) {
  auto str = [](std::string_view v) { return OptionValue(std::string(v)); };
  return {
      {"method", str(centroider_name(s.kind))},
      {"spot_sigma_px", s.spot_sigma_px},
      {"threshold_mode", str(name_of(kThresholdNames, static_cast<int>(s.threshold_mode)))},
      {"threshold", s.threshold},
      {"weight_sigma_px", s.weight_sigma_px},
      {"weight_follows_spot", s.weight_follows_spot},
      {"weight_iterations", static_cast<double>(s.weight_iterations)},
      {"weight_tolerance_px", s.weight_tolerance_px},
      {"brightest_pixels", static_cast<double>(s.brightest_pixels)},
      {"correlation_metric", str(name_of(kMetricNames, static_cast<int>(s.metric)))},
      {"peak_interpolation", str(name_of(kInterpNames, static_cast<int>(s.interpolation)))},
      {"search_px", static_cast<double>(s.search_px)},
      {"reference", str(name_of(kReferenceNames, static_cast<int>(s.reference)))},
      {"reference_file", str(s.reference_file)},
      {"fit_max_iterations", static_cast<double>(s.fit_max_iterations)},
      {"fit_tolerance_px", s.fit_tolerance_px},
      {"adu_per_electron", s.adu_per_electron},
  };
}

std::string describe(const CentroiderSettings& s) {
  const std::string_view method = centroider_name(s.kind);
  std::string out;
  for (const auto& [key, value] : list_options(s)) {
    if (key == "method") continue;
    const std::string_view name = key;  // (a structured binding cannot be captured before C++20 in clang 14)
    const auto it = std::find_if(kOptions.begin(), kOptions.end(),
                                 [&](const CentroiderOption& o) { return o.key == name; });
    if (!reads(it->methods, method)) continue;
    if (key == "reference_file" && s.reference != ReferenceSource::kFile) continue;
    out += fmt::format("{}{} = {}", out.empty() ? "" : ", ", key, format_option(value));
  }
  return out.empty() ? std::string(method) : fmt::format("{} ({})", method, out);
}

std::string validate(const CentroiderSettings& s, int p) {
  const int pixels = p * p;
  switch (s.kind) {
    case CentroiderKind::kCog: break;
    case CentroiderKind::kThresholded:
      if (s.threshold_mode == ThresholdMode::kRelative && s.threshold >= 1.0)
        return fmt::format("threshold {} with threshold_mode = \"relative\" is a fraction of the peak and "
                           "must be below 1 (every pixel would count as 0)", s.threshold);
      break;
    case CentroiderKind::kWeighted: break;
    case CentroiderKind::kBrightest:
      if (s.brightest_pixels >= pixels)
        return fmt::format("brightest_pixels {} must be below the {} pixels of a {} x {} box (one more "
                           "pixel gives the level subtracted)", s.brightest_pixels, pixels, p, p);
      break;
    case CentroiderKind::kCorrelation:
      if (p - 2 * s.search_px < 3)
        return fmt::format("search_px {} leaves a template of {} px in a {} px box; it needs >= 3 px "
                           "(search_px <= {})", s.search_px, p - 2 * s.search_px, p, (p - 3) / 2);
      if (s.interpolation == PeakInterpolation::kGaussian && s.metric != CorrelationMetric::kCc)
        return "peak_interpolation = \"gaussian\" takes logarithms of a positive maximum: use it with "
               "correlation_metric = \"cc\" (sdf and adf have a minimum)";
      if (s.reference != ReferenceSource::kGaussian) {
        if (s.reference_image.empty())
          return s.reference == ReferenceSource::kFile
                     ? std::string("reference = \"file\" needs reference_file (a FITS image of one box)")
                     : std::string("reference = \"captured\" has no captured image yet: capture one from "
                                   "the live stream first");
        if (s.reference_size != p ||
            s.reference_image.size() != static_cast<std::size_t>(pixels))
          return fmt::format("the reference image is {} x {} px; a box is {} x {} px", s.reference_size,
                             s.reference_size, p, p);
        double sum = 0.0;
        for (float v : s.reference_image) {
          if (!std::isfinite(v)) return "the reference image holds a NaN or infinite pixel";
          sum += v;
        }
        if (!(sum > 0.0)) return "the reference image has no positive light (its sum is <= 0)";
        const int t = p - 2 * s.search_px;
        double central = 0.0;
        for (int j = 0; j < t; ++j)
          for (int i = 0; i < t; ++i)
            central += s.reference_image[static_cast<std::size_t>(j + s.search_px) * p + i + s.search_px];
        if (!(central > 0.0))
          return fmt::format("the reference image has no positive light in its central {} x {} px (the "
                             "template left by search_px = {})", t, t, s.search_px);
      }
      break;
    case CentroiderKind::kQuadCell:
      if (p % 2 != 0 && p < 3) return "quad_cell needs boxes of 2 px or more";
      break;
    case CentroiderKind::kGaussianFit:
      if (pixels < 9) return fmt::format("gaussian_fit needs boxes of 3 x 3 px or more (6 parameters); the box is {} px", p);
      break;
  }
  return {};
}

std::vector<float> gaussian_reference(int size, double sigma) {
  std::vector<float> g(static_cast<std::size_t>(size) * size);
  std::vector<double> axis(static_cast<std::size_t>(size));
  const double c = 0.5 * (size - 1), k = 1.0 / (std::sqrt(2.0) * sigma);
  double total = 0.0;
  for (int i = 0; i < size; ++i) {
    axis[i] = 0.5 * (std::erf((i + 0.5 - c) * k) - std::erf((i - 0.5 - c) * k));
    total += axis[i];
  }
  for (int y = 0; y < size; ++y)
    for (int x = 0; x < size; ++x)
      g[static_cast<std::size_t>(y) * size + x] = static_cast<float>(axis[x] * axis[y] / (total * total));
  return g;
}

}  // namespace slopecast::core
