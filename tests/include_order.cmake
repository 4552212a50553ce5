# The layer order of src/ (core -> ir -> {onnx, data, ops} -> plan ->
# {train, compress} -> cli): fails, naming file:line and both layers, on an
# include of a layer that is not below the including file's own.
add_test(NAME include_order
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/include_order.py ${PROJECT_SOURCE_DIR})

# Library messages name settings in the library's words; the command line adds
# its option names (src/cli). Fails, naming file:line and the literal, on a
# string literal under src/ outside src/cli that holds "--" and a letter.
add_test(NAME library_flags
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/library_flags.py ${PROJECT_SOURCE_DIR})
