// The one source of nuwatch_test_pch, the target that builds the test programs' shared
// precompiled header (tests/CMakeLists.txt); a target needs a source to compile the header with.
