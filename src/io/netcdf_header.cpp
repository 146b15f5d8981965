// Parses the header of a classic NetCDF file far enough to know where its data ends.
// Layout: "NetCDF Classic and 64-bit Offset Format" and "CDF-5" in the NetCDF Users Guide
// (Unidata), File Format Specifications: header = magic numrecs dim_list gatt_list var_list;
// each variable ends its entry with nc_type, vsize and begin. Record variables hold numrecs
// records of recsize bytes, recsize being the sum of their (padded) vsizes.
#include "io/netcdf_header.hpp"

#include <cpl_vsi.h>

#include <algorithm>
#include <cstring>
#include <vector>

namespace kalends::detail {

namespace {

class HeaderReader {
 public:
  HeaderReader(VSILFILE* file, int version) : file_(file), version_(version) {}

  bool ok() const { return ok_; }
  std::uint64_t u32() { return read_big_endian(4); }
  // NON_NEG: 4 bytes, 8 in CDF-5.
  std::uint64_t count() { return read_big_endian(version_ == 5 ? 8 : 4); }
  // OFFSET: 4 bytes in the classic format, 8 in the two later ones.
  std::uint64_t offset() { return read_big_endian(version_ == 1 ? 4 : 8); }
  void skip(std::uint64_t bytes) {
    if (!ok_) return;
    if (bytes > (std::uint64_t(1) << 32) || VSIFSeekL(file_, VSIFTellL(file_) + bytes, SEEK_SET) != 0) ok_ = false;
  }
  void skip_name() { skip(padded(count())); }
  // An attribute list: ABSENT (two zero words) or NC_ATTRIBUTE nelems attr...
  void skip_attributes() {
    const std::uint64_t tag = u32();
    const std::uint64_t n = count();
    if (tag == 0) return;
    if (tag != 0x0C || n > 1'000'000) {
      ok_ = false;
      return;
    }
    for (std::uint64_t i = 0; i < n && ok_; ++i) {
      skip_name();
      const std::uint64_t type = u32();
      const std::uint64_t values = count();
      skip(padded(values * type_size(type)));
    }
  }
  static std::uint64_t padded(std::uint64_t bytes) { return (bytes + 3) / 4 * 4; }
  std::uint64_t type_size(std::uint64_t type) {
    switch (type) {
      case 1: case 2: case 7: return 1;   // byte, char, ubyte
      case 3: case 8: return 2;           // short, ushort
      case 4: case 5: case 9: return 4;   // int, float, uint
      case 6: case 10: case 11: return 8; // double, int64, uint64
      default: ok_ = false; return 0;
    }
  }

 private:
  std::uint64_t read_big_endian(int bytes) {
    unsigned char buffer[8] = {};
    if (!ok_ || VSIFReadL(buffer, 1, bytes, file_) != std::size_t(bytes)) {
      ok_ = false;
      return 0;
    }
    std::uint64_t value = 0;
    for (int i = 0; i < bytes; ++i) value = (value << 8) | buffer[i];
    return value;
  }
  VSILFILE* file_;
  int version_;
  bool ok_ = true;
};

struct Variable {
  bool record = false;
  std::uint64_t vsize = 0, begin = 0, type = 0;
  std::uint64_t values_per_record = 1;  // the product of the lengths of the other dimensions
};

std::optional<std::uint64_t> promised_size(VSILFILE* file, int version) {
  HeaderReader in(file, version);
  const std::uint64_t numrecs = in.count();
  const bool streaming = numrecs == (version == 5 ? ~std::uint64_t(0) : 0xFFFFFFFFu);

  std::vector<std::uint64_t> dimension_lengths;
  {
    const std::uint64_t tag = in.u32();
    const std::uint64_t n = in.count();
    if (tag != 0 && (tag != 0x0A || n > 100'000)) return std::nullopt;
    for (std::uint64_t i = 0; tag != 0 && i < n && in.ok(); ++i) {
      in.skip_name();
      dimension_lengths.push_back(in.count());
    }
  }
  in.skip_attributes();

  std::vector<Variable> variables;
  {
    const std::uint64_t tag = in.u32();
    const std::uint64_t n = in.count();
    if (tag != 0 && (tag != 0x0B || n > 1'000'000)) return std::nullopt;
    for (std::uint64_t i = 0; tag != 0 && i < n && in.ok(); ++i) {
      in.skip_name();
      Variable v;
      const std::uint64_t rank = in.count();
      if (rank > 1024) return std::nullopt;
      for (std::uint64_t d = 0; d < rank; ++d) {
        const std::uint64_t id = in.count();
        if (id >= dimension_lengths.size()) return std::nullopt;
        // The record dimension (length 0) can only come first.
        if (dimension_lengths[id] == 0 && d == 0)
          v.record = true;
        else
          v.values_per_record *= dimension_lengths[id];
      }
      in.skip_attributes();
      v.type = in.u32();
      v.vsize = in.count();
      v.begin = in.offset();
      variables.push_back(v);
    }
  }
  if (!in.ok() || streaming) return std::nullopt;

  // vsize is a 32-bit field in the two older formats: a variable too large for it says
  // 2^32 - 1, and its true end cannot be known from the header alone. Only the last variable
  // may be that large, so such a file is simply not checked.
  const std::uint64_t too_large = version == 5 ? ~std::uint64_t(0) : 0xFFFFFFFFu;
  std::uint64_t record_size = 0;
  int record_variables = 0;
  for (const Variable& v : variables) {
    if (v.vsize == too_large) return std::nullopt;
    if (v.record) {
      record_size += v.vsize;
      ++record_variables;
    }
  }
  // One record variable of a type narrower than 4 bytes: its records are not padded.
  if (record_variables == 1)
    for (const Variable& v : variables)
      if (v.record && in.type_size(v.type) < 4) record_size = v.values_per_record * in.type_size(v.type);

  // Each variable's end without the padding after it, which a writer may leave out at the end
  // of the file: a lower bound, so that no well-formed file is ever called short.
  std::uint64_t end = 0;
  for (const Variable& v : variables) {
    const std::uint64_t bytes = v.values_per_record * in.type_size(v.type);
    if (!v.record)
      end = std::max(end, v.begin + bytes);
    else if (numrecs > 0)
      end = std::max(end, v.begin + (numrecs - 1) * record_size + bytes);
  }
  if (!in.ok()) return std::nullopt;
  return end;
}

}  // namespace

std::optional<std::uint64_t> classic_netcdf_promised_size(const std::string& file) {
  VSILFILE* handle = VSIFOpenL(file.c_str(), "rb");
  if (handle == nullptr) return std::nullopt;
  char magic[4] = {};
  std::optional<std::uint64_t> size;
  if (VSIFReadL(magic, 1, 4, handle) == 4 && std::memcmp(magic, "CDF", 3) == 0 &&
      (magic[3] == 1 || magic[3] == 2 || magic[3] == 5))
    size = promised_size(handle, magic[3]);
  VSIFCloseL(handle);
  return size;
}

}  // namespace kalends::detail
