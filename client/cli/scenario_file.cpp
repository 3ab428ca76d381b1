#include "client/cli/scenario_file.h"

#include <fstream>
#include <set>
#include <sstream>

#include "daemon/io/toml_table_reader.h"

namespace slopecast::cli {

std::variant<ScenarioFile, std::string> parse_scenario(const std::string& text, const std::string& source) {
  auto fail = [&](const std::string& why) { return fmt::format("{}: {}", source, why); };
  auto parsed = io::parse_toml_text(text, source);
  if (auto* e = std::get_if<std::string>(&parsed)) return *e;
  const toml::value& root = std::get<toml::value>(parsed);
  static const std::set<std::string> kTables{"atmosphere", "layer", "pupil", "aberrations", "optics", "light", "detector"};
  for (const auto& [key, value] : root.as_table()) {
    if (!kTables.count(key)) return fail(fmt::format("unknown table or key '{}'", key));
    if (key == "layer" ? !value.is_array() : !value.is_table())
      return fail(key == "layer" ? "layers are written [[layer]], one table per layer"
                                 : fmt::format("'{}' must be a table ([{}])", key, key));
  }
  auto table = [&](const char* name) -> const toml::value* {
    const auto& t = root.as_table();
    auto it = t.find(name);
    return it == t.end() ? nullptr : &it->second;
  };
  ScenarioFile f;
  auto& s = f.scene;
  std::string error;
  auto done = [&](io::TableReader& r) {
    r.reject_unknown();
    if (error.empty()) error = r.error;
  };
  {
    io::TableReader r(table("atmosphere"), "atmosphere");
    r.number("r0_m", s.r0_m, 1e-4);
    r.number("r0_wavelength_nm", s.r0_wavelength_nm, 1);
    r.number("outer_scale_m", s.outer_scale_m, 1e-3);
    r.integer("subharmonic_levels", s.subharmonic_levels, 0, 8);
    r.integer("screen_samples", s.screen_samples, 0, 8192);
    done(r);
  }
  // No [[layer]]: no turbulence at all (static aberrations only), as the
  // README says; the struct's default single layer is for code that makes
  // scenes by hand.
  s.layers.clear();
  if (const auto* layers = table("layer")) {
    f.layers_given = true;
    s.layers.clear();
    int i = 0;
    for (const auto& l : layers->as_array()) {
      if (!l.is_table()) return fail("every [[layer]] must be a table");
      sim::TurbulenceLayer layer;
      io::TableReader r(&l, fmt::format("layer {}", ++i));
      r.number("fraction", layer.fraction, 1e-9);
      r.number("wind_m_per_s", layer.wind_m_per_s, 0);
      r.number("wind_direction_deg", layer.wind_direction_deg, -1e6);
      done(r);
      s.layers.push_back(layer);
    }
    if (s.layers.size() > 16) return fail("at most 16 layers");
  }
  {
    io::TableReader r(table("pupil"), "pupil");
    r.number("diameter_m", s.pupil_diameter_m, 1e-6);
    r.number("obstruction", s.obstruction, 0);
    r.number("subaperture_m", s.subaperture_m, 0);
    done(r);
  }
  if (const auto* ab = table("aberrations")) {
    for (const auto& [key, value] : ab->as_table()) {
      if (key != "zernike_nm") return fail(fmt::format("[aberrations] has an unknown key '{}'", key));
      if (!value.is_array()) return fail("[aberrations] zernike_nm: expected an array of numbers (nm rms, Noll j = 1, 2, ...)");
      for (const auto& v : value.as_array()) {
        if (!v.is_floating() && !v.is_integer()) return fail("[aberrations] zernike_nm: expected numbers");
        s.zernike_nm.push_back(v.is_integer() ? static_cast<double>(v.as_integer()) : v.as_floating());
      }
    }
  }
  {
    io::TableReader r(table("optics"), "optics");
    r.number("wavelength_nm", s.wavelength_nm, 1);
    r.number("pixels_per_lambda_over_d", s.optics.pixels_per_lambda_over_d, 0);
    r.integer("samples_per_subaperture", s.optics.samples_per_subaperture, 0, 256);
    r.integer("oversampling", s.optics.oversampling, 1, 15);
    r.number("source_sigma_px", s.optics.source_sigma_px, 0);
    done(r);
  }
  {
    io::TableReader r(table("light"), "light");
    r.number("photons_per_subaperture", s.photons_per_subaperture, 0);
    r.number("background_e_per_px", s.background_e_per_px, 0);
    done(r);
  }
  {
    io::TableReader r(table("detector"), "detector");
    r.number("read_noise_e", f.detector.read_noise_e, 0);
    r.number("dark_current_e_per_px", s.dark_current_e_per_px, 0);
    r.number("bias_adu", f.detector.bias_adu, 0);
    r.number("gain_e_per_adu", f.detector.gain_e_per_adu, 1e-6);
    r.integer("bit_depth", f.bit_depth, 1, 32);
    r.boolean("photon_noise", f.detector.photon_noise);
    done(r);
  }
  if (!error.empty()) return fail(error);
  return f;
}

std::variant<ScenarioFile, std::string> read_scenario(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return fmt::format("cannot read scenario '{}'", path);
  std::ostringstream text;
  text << in.rdbuf();
  return parse_scenario(text.str(), path);
}

}  // namespace slopecast::cli
