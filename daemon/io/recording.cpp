#include "daemon/io/recording.h"

#include <fcntl.h>
#include <sys/uio.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>

#include <fmt/format.h>
#include <zlib.h>

namespace slopecast::io {

namespace {

constexpr char kMagic[8] = {'S', 'L', 'C', 'R', 'E', 'C', '1', '\n'};
constexpr char kFooterMagic[8] = {'S', 'L', 'C', 'R', 'I', 'D', 'X', '\n'};
constexpr std::uint32_t kSync = 0x31524353u;  // "SCR1" read as little-endian bytes
constexpr std::size_t kBodyFixed = 12;        // kind, part count, zero, received_ns
constexpr std::size_t kFooterSize = 24;
constexpr std::uint32_t kMaxHeader = 1u << 20;

template <typename T>
void put(std::vector<std::byte>& out, T v) {
  std::byte b[sizeof(T)];
  std::memcpy(b, &v, sizeof(T));  // little-endian host (x86-64), as the layout says
  out.insert(out.end(), b, b + sizeof(T));
}

template <typename T>
T get(const std::byte* p) {
  T v;
  std::memcpy(&v, p, sizeof(T));
  return v;
}

std::string errno_text() { return std::strerror(errno); }

}  // namespace

std::uint32_t crc32_of(std::span<const std::byte> bytes, std::uint32_t seed) {
  uLong crc = seed;
  const auto* p = reinterpret_cast<const Bytef*>(bytes.data());
  std::size_t left = bytes.size();
  while (left > 0) {  // zlib takes uInt lengths
    const auto n = static_cast<uInt>(std::min<std::size_t>(left, 1u << 30));
    crc = ::crc32(crc, p, n);
    p += n;
    left -= n;
  }
  return static_cast<std::uint32_t>(crc);
}

std::filesystem::path rotated_path(const std::filesystem::path& path, unsigned part) {
  std::filesystem::path p = path;
  const std::string ext = p.extension().string();
  p.replace_extension();
  p += fmt::format(".{:04d}{}", part, ext.empty() ? ".screc" : ext);
  return p;
}

// ---- writer -----------------------------------------------------------------

std::variant<std::unique_ptr<RecordingWriter>, std::string> RecordingWriter::create(
    const std::filesystem::path& path, const v1::RecordingHeader& header) {
  const int fd = ::open(path.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0644);
  if (fd < 0)
    return fmt::format("cannot create recording '{}': {}{}", path.string(), errno_text(),
                       errno == EEXIST ? " (a recording is never overwritten; choose another name)" : "");
  auto w = std::unique_ptr<RecordingWriter>(new RecordingWriter());
  w->path_ = path;
  w->fd_ = fd;
  std::string h;
  header.SerializeToString(&h);
  std::vector<std::byte> out;
  out.insert(out.end(), reinterpret_cast<const std::byte*>(kMagic), reinterpret_cast<const std::byte*>(kMagic) + 8);
  put<std::uint32_t>(out, static_cast<std::uint32_t>(h.size()));
  const auto* hb = reinterpret_cast<const std::byte*>(h.data());
  out.insert(out.end(), hb, hb + h.size());
  put<std::uint32_t>(out, crc32_of({hb, h.size()}));
  if (auto e = w->write_all(out); !e.empty()) return e;
  return w;
}

RecordingWriter::~RecordingWriter() { close(); }

std::string RecordingWriter::write_all(std::span<const std::byte> bytes) {
  std::size_t done = 0;
  while (done < bytes.size()) {
    const ssize_t n = ::write(fd_, bytes.data() + done, bytes.size() - done);
    if (n < 0) {
      if (errno == EINTR) continue;
      return fmt::format("cannot write recording '{}': {}", path_.string(), errno_text());
    }
    done += static_cast<std::size_t>(n);
  }
  offset_ += bytes.size();
  return {};
}

std::string RecordingWriter::append(RecordKind kind, std::uint64_t received_ns,
                                    std::span<const std::string_view> parts) {
  if (fd_ < 0) return fmt::format("recording '{}' is closed", path_.string());
  if (parts.size() > kMaxRecordParts) return fmt::format("a message of {} parts is more than a record holds", parts.size());
  std::size_t body = kBodyFixed;
  for (auto p : parts) body += 4 + p.size();
  if (body > kMaxRecordBody) return fmt::format("a message of {} bytes is more than a record holds", body);
  buffer_.clear();
  buffer_.reserve(body + 12);
  put<std::uint32_t>(buffer_, kSync);
  put<std::uint32_t>(buffer_, static_cast<std::uint32_t>(body));
  put<std::uint8_t>(buffer_, static_cast<std::uint8_t>(kind));
  put<std::uint8_t>(buffer_, static_cast<std::uint8_t>(parts.size()));
  put<std::uint16_t>(buffer_, 0);
  put<std::uint64_t>(buffer_, received_ns);
  for (auto p : parts) {
    put<std::uint32_t>(buffer_, static_cast<std::uint32_t>(p.size()));
    const auto* b = reinterpret_cast<const std::byte*>(p.data());
    buffer_.insert(buffer_.end(), b, b + p.size());
  }
  put<std::uint32_t>(buffer_, crc32_of(std::span(buffer_).subspan(4)));
  const std::uint64_t at = offset_;
  if (auto e = write_all(buffer_); !e.empty()) return e;
  if (kind != RecordKind::kIndex) offsets_.push_back(at);
  return {};
}

std::string RecordingWriter::close() {
  if (fd_ < 0) return {};
  std::string error;
  const std::uint64_t index_at = offset_;
  const std::uint64_t count = offsets_.size();
  std::string list(offsets_.size() * 8, '\0');
  if (!offsets_.empty()) std::memcpy(list.data(), offsets_.data(), list.size());
  const std::string_view part[] = {list};
  if (offsets_.size() * 8 + kBodyFixed + 4 <= kMaxRecordBody) {  // else: no index (readers scan)
    error = append(RecordKind::kIndex, 0, part);
    if (error.empty()) {
      std::vector<std::byte> footer;
      put<std::uint64_t>(footer, index_at);
      put<std::uint64_t>(footer, count);
      footer.insert(footer.end(), reinterpret_cast<const std::byte*>(kFooterMagic),
                    reinterpret_cast<const std::byte*>(kFooterMagic) + 8);
      error = write_all(footer);
    }
  }
  if (::fsync(fd_) != 0 && error.empty())
    error = fmt::format("cannot flush recording '{}': {}", path_.string(), errno_text());
  ::close(fd_);
  fd_ = -1;
  return error;
}

// ---- reader -----------------------------------------------------------------

std::variant<std::unique_ptr<RecordingReader>, std::string> RecordingReader::open(const std::filesystem::path& path) {
  auto fail = [&](const std::string& why) { return fmt::format("cannot read recording '{}': {}", path.string(), why); };
  std::FILE* f = std::fopen(path.c_str(), "rb");
  if (!f) return fail(errno_text());
  auto r = std::unique_ptr<RecordingReader>(new RecordingReader());
  r->path_ = path;
  r->file_ = f;
  std::error_code ec;
  r->size_ = std::filesystem::file_size(path, ec);
  if (ec) return fail(ec.message());
  std::byte head[12];
  if (!r->read_at(0, head) || std::memcmp(head, kMagic, 8) != 0)
    return fail("not a slopecast recording (its first bytes are not the recording magic)");
  const auto hlen = get<std::uint32_t>(head + 8);
  if (hlen > kMaxHeader || 12 + std::uint64_t(hlen) + 4 > r->size_) return fail("its header is cut short or damaged");
  std::vector<std::byte> h(hlen + 4);
  if (!r->read_at(12, h)) return fail("its header is cut short");
  if (crc32_of(std::span(h).first(hlen)) != get<std::uint32_t>(h.data() + hlen))
    return fail("its header fails its checksum");
  if (!r->header_.ParseFromArray(h.data(), static_cast<int>(hlen))) return fail("its header does not parse");
  if (r->header_.file_version() != 1)
    return fail(fmt::format("file version {} is not one this slopecast reads (1)", r->header_.file_version()));
  r->offset_ = 12 + hlen + 4;
  r->data_end_ = r->size_;
  // The index, when the footer checks out.
  std::byte foot[kFooterSize];
  if (r->size_ >= r->offset_ + kFooterSize && r->read_at(r->size_ - kFooterSize, foot) &&
      std::memcmp(foot + 16, kFooterMagic, 8) == 0) {
    const auto index_at = get<std::uint64_t>(foot);
    const auto count = get<std::uint64_t>(foot + 8);
    const std::uint64_t saved = r->offset_;
    r->offset_ = index_at;
    RecordedMessage m;
    std::uint64_t next = 0;
    std::string why;
    bool torn = false;
    if (index_at >= saved && index_at < r->size_ &&
        r->parse_record(m, next, why, torn) == ReadOutcome::kRecord && m.kind == RecordKind::kIndex &&
        m.parts.size() == 1 && m.parts[0].size() % 8 == 0 && m.parts[0].size() / 8 == count &&
        next + kFooterSize == r->size_) {  // (count * 8 could wrap: compare by division)
      r->index_.resize(count);
      if (count) std::memcpy(r->index_.data(), m.parts[0].data(), count * 8);
      r->indexed_ = true;
      r->data_end_ = index_at;
    }
    r->offset_ = saved;
  }
  return r;
}

RecordingReader::~RecordingReader() {
  if (file_) std::fclose(file_);
}

bool RecordingReader::read_at(std::uint64_t offset, std::span<std::byte> out) {
  if (offset + out.size() > size_) return false;
  if (::fseeko(file_, static_cast<off_t>(offset), SEEK_SET) != 0) return false;
  return std::fread(out.data(), 1, out.size(), file_) == out.size();
}

bool RecordingReader::seek(std::uint64_t n) {
  if (!indexed_ || n >= index_.size()) return false;
  offset_ = index_[n];
  records_read_ = n;
  ended_ = false;
  return true;
}

ReadOutcome RecordingReader::parse_record(RecordedMessage& out, std::uint64_t& next_offset, std::string& why,
                                          bool& torn) {
  torn = false;
  std::byte head[8];
  if (offset_ + 8 > size_) {
    torn = true;
    why = fmt::format("{} bytes at offset {} are less than a record's framing", size_ - offset_, offset_);
    return ReadOutcome::kCorrupt;
  }
  read_at(offset_, head);
  if (get<std::uint32_t>(head) != kSync) {
    why = fmt::format("no record starts at offset {} (sync word missing)", offset_);
    return ReadOutcome::kCorrupt;
  }
  const auto body = get<std::uint32_t>(head + 4);
  if (body < kBodyFixed || body > kMaxRecordBody) {
    why = fmt::format("the record at offset {} claims {} bytes", offset_, body);
    return ReadOutcome::kCorrupt;
  }
  if (offset_ + 8 + body + 4 > size_) {
    torn = true;
    why = fmt::format("the record at offset {} needs {} bytes, the file holds {} more", offset_, body + 12,
                      size_ - offset_);
    return ReadOutcome::kCorrupt;
  }
  body_.resize(4 + body + 4);
  read_at(offset_ + 4, body_);
  if (crc32_of(std::span(body_).first(4 + body)) != get<std::uint32_t>(body_.data() + 4 + body)) {
    why = fmt::format("the record at offset {} fails its checksum", offset_);
    return ReadOutcome::kCorrupt;
  }
  const std::byte* p = body_.data() + 4;
  const auto kind = get<std::uint8_t>(p);
  const auto count = get<std::uint8_t>(p + 1);
  if (kind < 1 || kind > 4 || count > kMaxRecordParts) {
    why = fmt::format("the record at offset {} has kind {} and {} parts", offset_, kind, count);
    return ReadOutcome::kCorrupt;
  }
  out.kind = static_cast<RecordKind>(kind);
  out.received_ns = get<std::uint64_t>(p + 4);
  out.parts.resize(count);
  std::size_t at = kBodyFixed;
  for (std::size_t k = 0; k < count; ++k) {
    if (at + 4 > body) {
      why = fmt::format("the record at offset {} has parts that overrun it", offset_);
      return ReadOutcome::kCorrupt;
    }
    const auto len = get<std::uint32_t>(p + at);
    at += 4;
    if (len > body - at) {
      why = fmt::format("the record at offset {} has parts that overrun it", offset_);
      return ReadOutcome::kCorrupt;
    }
    out.parts[k].assign(reinterpret_cast<const char*>(p + at), len);
    at += len;
  }
  if (at != body) {
    why = fmt::format("the record at offset {} has {} bytes after its parts", offset_, body - at);
    return ReadOutcome::kCorrupt;
  }
  next_offset = offset_ + 8 + body + 4;
  return ReadOutcome::kRecord;
}

std::uint64_t RecordingReader::find_intact_record(std::uint64_t from) {
  constexpr std::size_t kChunk = 1 << 16;
  std::vector<std::byte> chunk;
  const std::uint64_t saved = offset_;
  for (std::uint64_t base = from; base + 4 <= data_end_; base += kChunk) {
    const std::size_t n = static_cast<std::size_t>(std::min<std::uint64_t>(kChunk + 3, data_end_ - base));
    chunk.resize(n);
    if (!read_at(base, chunk)) break;
    for (std::size_t i = 0; i + 4 <= n; ++i) {
      if (get<std::uint32_t>(chunk.data() + i) != kSync) continue;
      offset_ = base + i;
      RecordedMessage scratch;
      std::uint64_t next = 0;
      std::string why;
      bool torn = false;
      if (parse_record(scratch, next, why, torn) == ReadOutcome::kRecord) {
        const std::uint64_t at = offset_;
        offset_ = saved;
        return at;
      }
    }
  }
  offset_ = saved;
  return data_end_;
}

ReadOutcome RecordingReader::next(RecordedMessage& out) {
  while (!ended_) {
    if (offset_ >= data_end_) {
      ended_ = true;
      break;
    }
    // A footer without a valid index: the last 24 bytes are not a record.
    if (!indexed_ && size_ - offset_ == kFooterSize) {
      std::byte foot[kFooterSize];
      if (read_at(offset_, foot) && std::memcmp(foot + 16, kFooterMagic, 8) == 0) {
        ended_ = true;
        break;
      }
    }
    std::uint64_t next_offset = 0;
    std::string why;
    bool torn = false;
    const auto outcome = parse_record(out, next_offset, why, torn);
    if (outcome == ReadOutcome::kRecord) {
      offset_ = next_offset;
      if (out.kind == RecordKind::kIndex) {
        // What follows an index is its footer; a cut-short footer loses no data.
        if (offset_ < size_ && size_ - offset_ < kFooterSize) {
          ended_ = true;
          problem_ = fmt::format("'{}': the footer after record {} is cut short ({} of {} bytes); no data is lost",
                                 path_.string(), records_read_, size_ - offset_, kFooterSize);
          return ReadOutcome::kTornTail;
        }
        continue;
      }
      ++records_read_;
      return ReadOutcome::kRecord;
    }
    // Damage: look for the next intact record. None after a record that
    // runs past the end of the file means a torn tail (a write cut short);
    // one found means the damage was inside the file, and reading goes on.
    const std::uint64_t bad_at = offset_;
    const std::uint64_t found = find_intact_record(bad_at + 1);
    if (found == data_end_ && torn) {
      ended_ = true;
      problem_ = fmt::format("'{}': torn tail after record {}: {}; the {} bytes from offset {} are ignored",
                             path_.string(), records_read_, why, size_ - bad_at, bad_at);
      return ReadOutcome::kTornTail;
    }
    problem_ = fmt::format("'{}': record {} is damaged: {}; {}", path_.string(), records_read_, why,
                           found < data_end_
                               ? fmt::format("{} bytes skipped, reading goes on at offset {}", found - bad_at, found)
                               : std::string("no intact record follows"));
    offset_ = found;
    if (found >= data_end_) ended_ = true;
    ++records_read_;  // the damaged record keeps its number
    return ReadOutcome::kCorrupt;
  }
  return ReadOutcome::kEnd;
}

}  // namespace slopecast::io
