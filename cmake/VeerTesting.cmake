# Helpers every test folder uses, so each test runs in its own process with a timeout.

find_library(CMOCKA_LIB cmocka REQUIRED)

# veer_add_cmocka_test(NAME SOURCES a.c b.c [LIBS x y] [TIMEOUT s] [LABELS l])
function(veer_add_cmocka_test name)
  cmake_parse_arguments(T "" "TIMEOUT" "SOURCES;LIBS;LABELS" ${ARGN})
  if(NOT T_TIMEOUT)
    set(T_TIMEOUT 120)
  endif()
  add_executable(${name} ${T_SOURCES})
  target_include_directories(${name} PRIVATE ${CMAKE_SOURCE_DIR}/src ${CMAKE_SOURCE_DIR}/include)
  target_link_libraries(${name} PRIVATE veer ${CMOCKA_LIB} ${T_LIBS} ${MATH_LIB})
  add_test(NAME ${name} COMMAND ${name})
  set_tests_properties(${name} PROPERTIES TIMEOUT ${T_TIMEOUT} LABELS "unit;${T_LABELS}")
endfunction()

# veer_add_pytest(NAME FILE path/to/test_x.py [TIMEOUT s] [LABELS l])
# Runs Debian's pytest under /usr/bin/python3 with the generated Python code and the client
# package on PYTHONPATH, and VEER_BUILD_DIR / VEER_SOURCE_DIR set for the test to find binaries.
function(veer_add_pytest name)
  cmake_parse_arguments(T "" "FILE;TIMEOUT" "LABELS" ${ARGN})
  if(NOT T_TIMEOUT)
    set(T_TIMEOUT 300)
  endif()
  add_test(NAME ${name}
    COMMAND ${VEER_PYTHON} -m pytest -q -p no:cacheprovider ${CMAKE_CURRENT_SOURCE_DIR}/${T_FILE})
  set_tests_properties(${name} PROPERTIES TIMEOUT ${T_TIMEOUT} LABELS "python;${T_LABELS}"
    ENVIRONMENT "PYTHONPATH=${CMAKE_BINARY_DIR}/python:${CMAKE_SOURCE_DIR}/clients/python;VEER_BUILD_DIR=${CMAKE_BINARY_DIR};VEER_SOURCE_DIR=${CMAKE_SOURCE_DIR};PYTHONDONTWRITEBYTECODE=1")
endfunction()
