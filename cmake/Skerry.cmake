# Helpers shared by every CMakeLists in the project.
#
#   skerry_module(NAME SOURCES ... [DEPS ...])   one library per stage: modules/NAME
#   skerry_test(NAME SOURCES ... [DEPS ...] [LABELS ...] [TEST_FILTER gtest-filter])
#                                                a GoogleTest binary registered with CTest
#   skerry_benchmark(NAME SOURCES ... [DEPS ...])  a program that prints figures (never a test)

set(SKERRY_WARNINGS -Wall -Wextra -Wpedantic $<$<CXX_COMPILER_ID:GNU>:-Wshadow=local> -Wnon-virtual-dtor
    -Wno-deprecated-enum-enum-conversion
    # GCC 12 reports false -Wrestrict/-Warray-bounds positives inside libstdc++ at -O3.
    $<$<CXX_COMPILER_ID:GNU>:-Wno-restrict -Wno-array-bounds -Wno-stringop-overflow>)

function(skerry_apply_common target)
  target_compile_options(${target} PRIVATE ${SKERRY_WARNINGS})
  if(SKERRY_WERROR)
    target_compile_options(${target} PRIVATE -Werror)
  endif()
  if(SKERRY_SANITIZE)
    string(REPLACE ";" "," _san "${SKERRY_SANITIZE}")
    target_compile_options(${target} PRIVATE -fsanitize=${_san} -fno-omit-frame-pointer -fno-sanitize-recover=all)
    target_link_options(${target} PRIVATE -fsanitize=${_san})
  endif()
endfunction()

function(skerry_module name)
  cmake_parse_arguments(M "" "" "SOURCES;DEPS" ${ARGN})
  add_library(skerry_${name} STATIC ${M_SOURCES})
  add_library(skerry::${name} ALIAS skerry_${name})
  target_include_directories(skerry_${name} PUBLIC ${CMAKE_CURRENT_SOURCE_DIR}/include)
  target_link_libraries(skerry_${name} PUBLIC ${M_DEPS})
  skerry_apply_common(skerry_${name})
  set_property(GLOBAL APPEND PROPERTY SKERRY_MODULES skerry_${name})
endfunction()

function(skerry_test name)
  cmake_parse_arguments(T "" "TEST_FILTER" "SOURCES;DEPS;LABELS" ${ARGN})
  add_executable(test_${name} ${T_SOURCES})
  target_include_directories(test_${name} PRIVATE ${PROJECT_SOURCE_DIR}/tests/support)
  target_link_libraries(test_${name} PRIVATE ${T_DEPS} GTest::gtest GTest::gtest_main)
  target_compile_definitions(test_${name} PRIVATE
    SKERRY_TEST_DATA_DIR="${PROJECT_SOURCE_DIR}/tests/data"
    SKERRY_BINARY="$<TARGET_FILE:skerry>"
    SKERRY_SOURCE_DIR="${PROJECT_SOURCE_DIR}")
  # A test that runs the executable (it names SKERRY_BINARY or uses the shared
  # helpers that run it) links tests/support and depends on the `skerry` target,
  # so it never runs a stale binary.
  set(_runs_binary OFF)
  foreach(_s ${T_SOURCES})
    get_filename_component(_p ${_s} ABSOLUTE)
    file(READ ${_p} _text)
    if(_text MATCHES "SKERRY_BINARY|skerry_test_support\\.h|extract_helpers\\.h|survey_fixture\\.h")
      set(_runs_binary ON)
    endif()
  endforeach()
  if(_runs_binary)
    target_link_libraries(test_${name} PRIVATE skerry_test_support)
    add_dependencies(test_${name} skerry)
  endif()
  skerry_apply_common(test_${name})
  set(_filter)
  if(T_TEST_FILTER)
    set(_filter TEST_FILTER ${T_TEST_FILTER})
  endif()
  gtest_discover_tests(test_${name} ${_filter} DISCOVERY_TIMEOUT 60 TEST_LIST test_${name}_TESTS)
  skerry_label_tests(test_${name}_TESTS "${T_LABELS}")
endfunction()

# Gives every test of a discovered list (gtest_discover_tests' TEST_LIST
# variable) all of `labels`. Passed through gtest_discover_tests' PROPERTIES,
# a list of labels loses every label after the first (CMake 3.25), so they are
# set by a file CTest includes after the discovered tests.
function(skerry_label_tests list_var labels)
  set(_f ${CMAKE_CURRENT_BINARY_DIR}/${list_var}_labels.cmake)
  file(WRITE ${_f} "if(${list_var})\n  set_tests_properties(\${${list_var}} PROPERTIES LABELS \"${labels}\")\nendif()\n")
  set_property(DIRECTORY APPEND PROPERTY TEST_INCLUDE_FILES ${_f})
endfunction()

function(skerry_benchmark name)
  cmake_parse_arguments(B "" "" "SOURCES;DEPS" ${ARGN})
  add_executable(bench_${name} ${B_SOURCES})
  target_link_libraries(bench_${name} PRIVATE ${B_DEPS})
  skerry_apply_common(bench_${name})
endfunction()
