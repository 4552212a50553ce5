# scripts/bench.py --quick: a few steps of the speed table (garment and
# ResNet-8-style students against a PyTorch loop from Debian's python3-torch),
# checking that both sides run, masks stay exact and every figure is finite.
# It asserts nothing about speed. Release build only.
if(NOT RECOUP_SANITIZE)
  add_test(NAME bench_quick
           COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/bench.py --quick --recoup $<TARGET_FILE:recoup>)
  set_tests_properties(bench_quick PROPERTIES TIMEOUT 300)
endif()
