// Writes the wire reference (Markdown) from the .proto files' own comments:
// every message with its fields (number, type, comment) and every enum with
// its values, in file order. Input: a FileDescriptorSet made by protoc with
// --include_source_info; output: the Markdown file.
//
//   wire_reference DESCRIPTOR_SET OUT.md
#include <fstream>
#include <iostream>
#include <sstream>

#include <google/protobuf/descriptor.h>
#include <google/protobuf/descriptor.pb.h>

namespace pb = google::protobuf;

namespace {

std::string comment_of(const pb::SourceLocation& loc) {
  std::string text = loc.leading_comments;
  if (!loc.trailing_comments.empty()) text += (text.empty() ? "" : " ") + loc.trailing_comments;
  std::string out;
  std::istringstream in(text);
  for (std::string line; std::getline(in, line);) {
    const auto first = line.find_first_not_of(' ');
    if (first == std::string::npos) continue;
    if (!out.empty()) out += ' ';
    out += line.substr(first);
  }
  for (auto& c : out)
    if (c == '|') c = '/';
  return out;
}

template <typename D>
std::string comment(const D* d) {
  pb::SourceLocation loc;
  return d->GetSourceLocation(&loc) ? comment_of(loc) : std::string();
}

std::string type_of(const pb::FieldDescriptor* f) {
  std::string t = f->message_type() ? f->message_type()->name() : f->enum_type() ? f->enum_type()->name() : f->type_name();
  return f->is_repeated() ? "repeated " + t : t;
}

}  // namespace

int main(int argc, char** argv) {
  if (argc != 3) {
    std::cerr << "usage: wire_reference DESCRIPTOR_SET OUT.md\n";
    return 2;
  }
  pb::FileDescriptorSet set;
  std::ifstream in(argv[1], std::ios::binary);
  if (!set.ParseFromIstream(&in)) {
    std::cerr << "wire_reference: cannot read " << argv[1] << "\n";
    return 1;
  }
  pb::DescriptorPool pool;
  std::vector<const pb::FileDescriptor*> files;
  for (const auto& f : set.file()) {
    const auto* d = pool.BuildFile(f);
    if (!d) {
      std::cerr << "wire_reference: cannot build " << f.name() << "\n";
      return 1;
    }
    if (d->package() == "slopecast.v1") files.push_back(d);
  }
  std::ostringstream out;
  out << "# slopecast wire reference (contract v1)\n\n"
      << "Generated from the comments of proto/slopecast/v1/*.proto when slopecast is built; the .proto files are "
         "the source.\n";
  for (const auto* file : files) {
    out << "\n## " << file->name() << "\n";
    pb::SourceLocation loc;
    // The file's leading comment sits on its syntax statement.
    for (int i = 0; i < file->message_type_count(); ++i) {
      const auto* m = file->message_type(i);
      out << "\n### message " << m->name() << "\n\n";
      if (auto c = comment(m); !c.empty()) out << c << "\n\n";
      out << "| # | field | type | meaning |\n|---|---|---|---|\n";
      for (int k = 0; k < m->field_count(); ++k) {
        const auto* f = m->field(k);
        out << "| " << f->number() << " | `" << f->name() << "` | " << type_of(f) << " | " << comment(f) << " |\n";
      }
    }
    for (int i = 0; i < file->enum_type_count(); ++i) {
      const auto* e = file->enum_type(i);
      out << "\n### enum " << e->name() << "\n\n";
      if (auto c = comment(e); !c.empty()) out << c << "\n\n";
      out << "| value | name | meaning |\n|---|---|---|\n";
      for (int k = 0; k < e->value_count(); ++k)
        out << "| " << e->value(k)->number() << " | `" << e->value(k)->name() << "` | " << comment(e->value(k)) << " |\n";
    }
  }
  std::ofstream(argv[2]) << out.str();
  return 0;
}
