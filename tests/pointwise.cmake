# Training through the 1x1 batched matmul (src/ops/conv_dnnl_1x1.c) on the
# exported mobilenet_v2: no allocation in steady state, byte-identical
# students from two runs; once more on recoup's own GEMMs where oneDNN is built in
# (release build only: the sanitizer build runs the default path once).
set_tests_properties(test_train_pointwise PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 300)
if(RECOUP_DNNL_BUILT AND NOT RECOUP_SANITIZE)
  add_test(NAME test_train_pointwise_builtin COMMAND test_train_pointwise)
  set_tests_properties(test_train_pointwise_builtin PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 300
    SKIP_RETURN_CODE 77
    ENVIRONMENT "RECOUP_CONV_PATH=builtin;RECOUP_SOURCE_DIR=${PROJECT_SOURCE_DIR};RECOUP_BINARY_DIR=${CMAKE_BINARY_DIR}")
endif()
