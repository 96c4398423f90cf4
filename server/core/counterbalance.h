// Counterbalanced orders of conditions for within-subject studies
// (docs/studies.md, "Schedule"): which condition each participant meets
// first, second, ... Pure functions over condition indices 0..n-1.
#ifndef TICKMARK_SERVER_CORE_COUNTERBALANCE_H_
#define TICKMARK_SERVER_CORE_COUNTERBALANCE_H_

#include <vector>

namespace tickmark {

// A cyclic Latin square: row r is r, r+1, ..., r+n-1 (mod n). Each condition
// appears once in every position; carry-over is not balanced. n rows; empty
// for n < 1.
std::vector<std::vector<int>> CyclicLatinSquare(int n);

// A balanced Latin square (Williams design). For even n, n rows whose first
// is 0, 1, n-1, 2, n-2, 3, ... and row r adds r (mod n): every condition
// appears once in every position and immediately follows every other
// condition exactly once. For odd n no single square balances that, so the
// design (n > 1) is that square followed by its mirror (each row reversed): 2n rows,
// every condition following every other exactly twice. Empty for n < 1.
std::vector<std::vector<int>> WilliamsDesign(int n);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_COUNTERBALANCE_H_
