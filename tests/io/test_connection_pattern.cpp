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

TEST_CASE("the file inside a connection string", "[io]") {
  using kalends::detail::file_in_connection;
  CHECK(file_in_connection(R"(NETCDF:"a/f_20200101.nc":tas)") == "a/f_20200101.nc");
  CHECK(file_in_connection(R"(HDF5:"f_20200101.h5"://ndvi)") == "f_20200101.h5");
  CHECK(file_in_connection("ndvi/ndvi_2020-01-01.tif") == "ndvi/ndvi_2020-01-01.tif");
  const auto h5 = kalends::detail::connection_parts(R"(HDF5:"f.h5"://ndvi)");
  REQUIRE(h5);
  CHECK(h5->variable() == "ndvi");
}
