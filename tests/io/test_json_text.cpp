#include <catch2/catch.hpp>

#include "io/json_text.hpp"

using kalends::detail::json_escape;

TEST_CASE("json_escape writes valid UTF-8 whatever bytes a path holds", "[json]") {
  CHECK(json_escape("NETCDF:\"a.nc\":tas") == "NETCDF:\\\"a.nc\\\":tas");
  CHECK(json_escape("a\\b\n") == "a\\\\b\\u000a");
  // UTF-8 passes as it is.
  CHECK(json_escape("lat\xc3\xa9in") == "lat\xc3\xa9in");
  CHECK(json_escape("\xe2\x82\xac") == "\xe2\x82\xac");
  // A Latin-1 byte (a folder named on another system) had been written raw: no JSON reader took
  // the summary. It is now the code point of the byte.
  CHECK(json_escape("lat\xe9in") == "lat\\u00e9in");
  CHECK(json_escape("\xc3") == "\\u00c3");          // a lead byte cut short
  CHECK(json_escape("\x80x") == "\\u0080x");        // a continuation byte alone
}
