// The precompiled header every test program shares (tests/CMakeLists.txt, nuwatch_test_pch):
// what most test files include, and what costs most to parse. Test files still include what
// they use; this header only saves the parsing. Keep it to GoogleTest, Eigen and the standard
// library, which every test program links or has: a header only some tests may use (a daemon
// library's, ZeroMQ, nlohmann/json) does not belong here.
#ifndef NUWATCH_TESTS_COMMON_PRECOMPILED_H_
#define NUWATCH_TESTS_COMMON_PRECOMPILED_H_

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <Eigen/Core>
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <filesystem>
#include <fstream>
#include <functional>
#include <limits>
#include <map>
#include <memory>
#include <optional>
#include <random>
#include <set>
#include <span>
#include <sstream>
#include <string>
#include <string_view>
#include <vector>

#endif  // NUWATCH_TESTS_COMMON_PRECOMPILED_H_
