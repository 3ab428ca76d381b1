// One letter per reason a subaperture is not valid, for pictures and
// terminal maps (`slopecast snap`, `slopecast watch --map`). The first
// reason in this order names a subaperture with several.
#pragma once

#include <cstdint>
#include <string>

namespace slopecast::client {

struct FlagLetter {
  std::uint32_t bit;
  char letter;
  const char* meaning;
};

inline constexpr FlagLetter kFlagLetters[] = {
    {2048, 'm', "masked (outside the valid map)"},
    {16, 's', "saturated"},
    {2, 'n', "non-finite pixels or centroid"},
    {1, 'f', "low flux"},
    {4, 'r', "low signal-to-noise"},
    {8, 'o', "centroid outside the box"},
    {32, 'e', "centroid near the box edge"},
    {64, 'c', "low correlation contrast"},
    {128, 'w', "spot too wide"},
    {1024, 'p', "spot too narrow (a hot pixel?)"},
    {256, 'l', "spot elongated"},
    {512, 'x', "the method failed"},
    {4096, 'g', "negative pixels after correction"},
};

// The letter for a subaperture's flags; ' ' when valid (flags 0), '?' for a
// bit not listed.
inline char flag_letter(std::uint32_t flags) {
  if (flags == 0) return ' ';
  for (const auto& f : kFlagLetters)
    if (flags & f.bit) return f.letter;
  return '?';
}

inline std::string flag_legend(const char* separator = ", ") {
  std::string out;
  for (const auto& f : kFlagLetters) {
    if (!out.empty()) out += separator;
    out += f.letter;
    out += " ";
    out += f.meaning;
  }
  return out;
}

}  // namespace slopecast::client
