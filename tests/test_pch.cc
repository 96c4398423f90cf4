// The translation unit that builds the tests' shared precompiled header
// (tests/CMakeLists.txt, tickmark_test_pch); it has nothing of its own.
