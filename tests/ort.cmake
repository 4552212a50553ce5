# The demo models in onnxruntime-web (npm, wasm, one thread; tests/ort) against
# PyTorch (Debian python3-torch) on the first Fashion-MNIST test images
# (Debian dataset-fashion-mnist). Needs Node and `npm ci` in tests/ort, both
# done by scripts/setup.sh.
find_program(RECOUP_NODE node DOC "Node.js for the onnxruntime-web checks")
if(RECOUP_NODE AND EXISTS ${PROJECT_SOURCE_DIR}/tests/ort/node_modules/onnxruntime-web/package.json)
  add_test(NAME ort_demo_samples
           COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/make_demo_samples.py
                   ${CMAKE_BINARY_DIR}/ort_demo)
  set_tests_properties(ort_demo_samples PROPERTIES FIXTURES_SETUP ort_demo TIMEOUT 300)
  # Tolerance |ort - torch| <= 1e-4 * (1 + |torch|): float32 sums in a
  # different order (common practice for comparing float32 runtimes).
  foreach(pair "garment_dense;all" "garment_pruned90;disabled")
    list(GET pair 0 stem)
    list(GET pair 1 opt)
    add_test(NAME ort_${stem}
             COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ort_compare.py
                     ${PROJECT_SOURCE_DIR}/models/${stem}.onnx ${CMAKE_BINARY_DIR}/ort_demo/images.npy
                     ${CMAKE_BINARY_DIR}/ort_demo/${stem}.logits.npy 1e-4 --opt ${opt})
    set_tests_properties(ort_${stem} PROPERTIES FIXTURES_REQUIRED ort_demo TIMEOUT 300
                         ENVIRONMENT "RECOUP_NODE=${RECOUP_NODE}")
  endforeach()
else()
  add_test(NAME ort_demo_missing
           COMMAND sh -c "echo 'onnxruntime-web checks need node and tests/ort/node_modules: run scripts/setup.sh, then re-run cmake' >&2; exit 1")
endif()
