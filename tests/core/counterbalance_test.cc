#include "server/core/counterbalance.h"

#include <gtest/gtest.h>

#include <map>
#include <string>
#include <utility>

namespace tickmark {
namespace {

std::vector<std::string> Letters(const std::vector<std::vector<int>>& rows) {
  std::vector<std::string> out;
  for (const auto& row : rows) {
    std::string s;
    for (int v : row) s += static_cast<char>('A' + v);
    out.push_back(s);
  }
  return out;
}

// Every ordered pair (a, b), a != b, as neighbours (b right after a) in a row.
std::map<std::pair<int, int>, int> CarryOver(const std::vector<std::vector<int>>& rows) {
  std::map<std::pair<int, int>, int> pairs;
  for (const auto& row : rows) {
    for (size_t i = 1; i < row.size(); ++i) ++pairs[{row[i - 1], row[i]}];
  }
  return pairs;
}

TEST(Counterbalance, WilliamsFourMatchesThePublishedSquare) {
  // Williams, E. J. (1949), "Experimental designs balanced for the estimation
  // of residual effects of treatments", Aust. J. Sci. Res. A 2:149-168: the
  // four-treatment square ABDC / BCAD / CDBA / DACB, as reproduced in Jones &
  // Kenward, "Design and Analysis of Cross-Over Trials" (from memory).
  EXPECT_EQ(Letters(WilliamsDesign(4)), (std::vector<std::string>{"ABDC", "BCAD", "CDBA", "DACB"}));
}

TEST(Counterbalance, WilliamsSixFirstRow) {
  // Williams (1949) construction, first row 0, 1, n-1, 2, n-2, 3 for six
  // treatments: ABFCED (Jones & Kenward, from memory).
  EXPECT_EQ(Letters(WilliamsDesign(6))[0], "ABFCED");
}

TEST(Counterbalance, WilliamsThreeIsSquareAndMirror) {
  // Odd n needs two squares (Williams 1949); for three treatments the six
  // sequences ABC, BCA, CAB, CBA, ACB, BAC (Jones & Kenward, from memory).
  EXPECT_EQ(Letters(WilliamsDesign(3)),
            (std::vector<std::string>{"ABC", "BCA", "CAB", "CBA", "ACB", "BAC"}));
}

TEST(Counterbalance, WilliamsIsBalancedForFirstOrderCarryOver) {
  // The defining property of a balanced Latin square (Williams 1949): each
  // condition once per position (per square) and each ordered pair of
  // different conditions adjacent equally often (once for even n, twice
  // for odd n).
  for (int n = 1; n <= 9; ++n) {
    auto rows = WilliamsDesign(n);
    const int squares = (n % 2 == 0 || n == 1) ? 1 : 2;
    ASSERT_EQ(rows.size(), static_cast<size_t>(n * squares)) << n;
    for (int pos = 0; pos < n; ++pos) {
      std::map<int, int> seen;
      for (const auto& row : rows) ++seen[row[pos]];
      for (int c = 0; c < n; ++c) EXPECT_EQ(seen[c], squares) << "n=" << n << " pos=" << pos;
    }
    if (n == 1) continue;
    auto pairs = CarryOver(rows);
    EXPECT_EQ(pairs.size(), static_cast<size_t>(n * (n - 1))) << n;
    for (const auto& [pair, count] : pairs) EXPECT_EQ(count, squares) << "n=" << n;
  }
}

TEST(Counterbalance, CyclicSquareIsLatin) {
  // A Latin square: each symbol once per row and column (definition; common
  // practice, no source).
  EXPECT_EQ(Letters(CyclicLatinSquare(3)), (std::vector<std::string>{"ABC", "BCA", "CAB"}));
  EXPECT_TRUE(CyclicLatinSquare(0).empty());
  EXPECT_TRUE(WilliamsDesign(0).empty());
}

}  // namespace
}  // namespace tickmark
