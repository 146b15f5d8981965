// The rows each shard of a cluster run owns (src/pipeline/shard_plan.cpp).
#include <catch2/catch.hpp>

#include "pipeline/shard_plan.hpp"

using namespace kalends;

TEST_CASE("shards cover every row once, in whole strips, as evenly as strips allow", "[pipeline][shards]") {
  for (auto [height, shards] : std::vector<std::pair<int, int>>{
           {256, 1}, {512, 2}, {1024, 4}, {1000, 3}, {4097, 7}, {20000, 64}, {257, 2}, {65536, 256}}) {
    detail::ShardPlan plan;
    plan.shards = shards;
    Grid grid;
    grid.width = 300;
    grid.height = height;
    plan.grids["ndvi"] = grid;
    const int strips = (height + detail::ShardPlan::tile - 1) / detail::ShardPlan::tile;
    int next_row = 0, fewest = strips, most = 0;
    for (int k = 1; k <= shards; ++k) {
      const Window w = plan.window("ndvi", k);
      CAPTURE(height, shards, k);
      CHECK(w.x == 0);
      CHECK(w.width == 300);
      CHECK(w.y == next_row);  // contiguous, in shard order
      CHECK(w.y % detail::ShardPlan::tile == 0);
      REQUIRE(w.height > 0);
      const bool last = w.y + w.height == height;
      CHECK((w.height % detail::ShardPlan::tile == 0 || last));
      const int own = (w.height + detail::ShardPlan::tile - 1) / detail::ShardPlan::tile;
      fewest = std::min(fewest, own);
      most = std::max(most, own);
      next_row = w.y + w.height;
    }
    CHECK(next_row == height);
    CHECK(most - fewest <= 1);
  }
}

TEST_CASE("the same job and shard count give the same shards", "[pipeline][shards]") {
  detail::ShardPlan a, b;
  a.shards = b.shards = 5;
  Grid grid;
  grid.width = 10;
  grid.height = 3000;
  a.grids["x"] = b.grids["x"] = grid;
  a.out = b.out = "/data/out";
  CHECK(a.text() == b.text());
  CHECK(a.shard_folder(3) == "/data/out/.kalends/shards/3-of-5");
  CHECK(a.file() == "/data/out/.kalends/plan.tsv");
}

TEST_CASE("a path with a tab or a line break stays one field of one line of the plan", "[pipeline][shards]") {
  detail::ShardPlan plan;
  plan.shards = 2;
  Grid grid;
  grid.width = 10;
  grid.height = 600;
  plan.grids["ndvi\tmain"] = grid;
  plan.job_path = "/data/night\\ly/job.toml";
  plan.out = "/data/out\nshards\t99\r";
  detail::PlannedStep step;
  step.id = "filled";
  step.kind = "fill";
  step.split = true;
  step.root = "ndvi\tmain";
  plan.steps.push_back(step);
  const std::string text = plan.text();
  std::vector<std::string> lines;
  for (std::size_t at = 0, next; at < text.size(); at = next + 1) {
    next = text.find('\n', at);
    lines.push_back(text.substr(at, next - at));
  }
  // 2 comments, job, out, shards, tile, memory, threads, 1 step, 2 shard rows.
  REQUIRE(lines.size() == 11);
  CHECK(lines[2] == "job\t/data/night\\\\ly/job.toml");
  CHECK(lines[3] == "out\t/data/out\\nshards\\t99\\r");
  CHECK(lines[4] == "shards\t2");
  CHECK(lines[8] == "step\tfilled\tfill\tsplit\tndvi\\tmain");
  CHECK(lines[9].rfind("shard\t1\tndvi\\tmain\trows\t0\t", 0) == 0);
  CHECK(text.find('\r') == std::string::npos);
}
