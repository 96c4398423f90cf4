#include "server/core/counterbalance.h"

namespace tickmark {

std::vector<std::vector<int>> CyclicLatinSquare(int n) {
  std::vector<std::vector<int>> rows;
  for (int r = 0; r < n; ++r) {
    std::vector<int> row;
    for (int c = 0; c < n; ++c) row.push_back((r + c) % n);
    rows.push_back(std::move(row));
  }
  return rows;
}

std::vector<std::vector<int>> WilliamsDesign(int n) {
  if (n < 1) return {};
  // First row: 0, 1, n-1, 2, n-2, ... (alternating from the front and back).
  std::vector<int> first;
  int low = 0, high = n - 1;
  for (int i = 0; i < n; ++i) {
    if (i == 0) {
      first.push_back(low++);
    } else if (i % 2 == 1) {
      first.push_back(low++);
    } else {
      first.push_back(high--);
    }
  }
  std::vector<std::vector<int>> rows;
  for (int r = 0; r < n; ++r) {
    std::vector<int> row;
    for (int v : first) row.push_back((v + r) % n);
    rows.push_back(std::move(row));
  }
  if (n % 2 == 1 && n > 1) {
    for (int r = 0; r < n; ++r) rows.push_back(std::vector<int>(rows[r].rbegin(), rows[r].rend()));
  }
  return rows;
}

}  // namespace tickmark
