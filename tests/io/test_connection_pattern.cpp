// One variable of many container files: the pattern inside GDAL's connection string.
#include <catch2/catch.hpp>

#include "io/file_glob.hpp"

using kalends::detail::connection_pattern;

TEST_CASE("a pattern inside a NetCDF connection string is found and rebuilt per file", "[io]") {
  const auto c = connection_pattern(R"(NETCDF:"daily/*.nc":ndvi)");
  REQUIRE(c);
  CHECK(c->files == "daily/*.nc");
  CHECK(c->connection("daily/a_20200101.nc") == R"(NETCDF:"daily/a_20200101.nc":ndvi)");
  CHECK(c->variable() == "ndvi");
}

TEST_CASE("an HDF4-EOS field name becomes a name fit for files", "[io]") {
  const auto c = connection_pattern(R"(HDF4_EOS:EOS_GRID:"MOD13A1/*.hdf":MODIS_Grid_16DAY_500m_VI:"500m 16 days NDVI")");
  REQUIRE(c);
  CHECK(c->files == "MOD13A1/*.hdf");
  CHECK(c->connection("MOD13A1/x.hdf") ==
        R"(HDF4_EOS:EOS_GRID:"MOD13A1/x.hdf":MODIS_Grid_16DAY_500m_VI:"500m 16 days NDVI")");
  CHECK(c->variable() == "500m_16_days_NDVI");
}

TEST_CASE("plain patterns, single files and unquoted strings are not connection patterns", "[io]") {
  CHECK_FALSE(connection_pattern("ndvi/*.tif"));
  CHECK_FALSE(connection_pattern(R"(NETCDF:"tas.nc":tas)"));
  CHECK_FALSE(connection_pattern(R"("quoted/*.tif")"));  // no driver before the quote
  CHECK_FALSE(connection_pattern(R"(NETCDF:"daily/*.nc)"));  // no closing quote
}
