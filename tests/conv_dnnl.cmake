# Conv on oneDNN's path (RECOUP_CONV_PATH=dnnl), where the build has it:
# determinism and agreement of `recoup distill` with recoup's own path; and,
# as oneDNN is then the default that test_train_steady_alloc runs, the same
# allocation count on recoup's own path. (The kernels
# themselves: test_ops_conv_paths and test_ops_conv_ref_dnnl, which the
# sanitizer build runs too; these two run in the release build only.)
if(RECOUP_DNNL_BUILT AND NOT RECOUP_SANITIZE)
  add_test(NAME distill_conv_dnnl
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/conv_dnnl_test.py $<TARGET_FILE:recoup>
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/conv_dnnl_test)
  set_tests_properties(distill_conv_dnnl PROPERTIES TIMEOUT 600 SKIP_RETURN_CODE 77)
  add_test(NAME test_train_steady_alloc_builtin COMMAND test_train_steady_alloc)
  set_tests_properties(test_train_steady_alloc_builtin PROPERTIES TIMEOUT 600 SKIP_RETURN_CODE 77
    ENVIRONMENT "RECOUP_CONV_PATH=builtin;RECOUP_SOURCE_DIR=${PROJECT_SOURCE_DIR};RECOUP_BINARY_DIR=${CMAKE_BINARY_DIR}")
endif()
