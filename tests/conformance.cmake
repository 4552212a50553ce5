# ONNX conformance: test_conformance runs ONNX's backend test data (Debian's
# libonnx-testdata). Its PyTorch-made suites are opset 6; this fixture
# upgrades them with ONNX's own version converter so they run as well.
set(RECOUP_ONNX_TESTDATA /usr/share/libonnx-testdata/data CACHE PATH
    "ONNX backend test data (Debian: libonnx-testdata)")
add_test(NAME conformance_upgrade
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/conformance_upgrade.py
                 ${RECOUP_ONNX_TESTDATA} ${CMAKE_BINARY_DIR}/conformance_upgraded)
set_tests_properties(conformance_upgrade PROPERTIES FIXTURES_SETUP conformance_upgraded TIMEOUT 300)
if(TEST test_conformance)
  set_tests_properties(test_conformance PROPERTIES FIXTURES_REQUIRED conformance_upgraded)
  set_property(TEST test_conformance APPEND PROPERTY ENVIRONMENT
               "RECOUP_ONNX_TESTDATA=${RECOUP_ONNX_TESTDATA}"
               "RECOUP_CONFORMANCE_UPGRADED=${CMAKE_BINARY_DIR}/conformance_upgraded")
endif()
