# Writes a C++ header that holds a file's bytes, so the program carries the
# file instead of reading it from the source tree at run time. CMakeLists.txt
# runs it at build time whenever the file changes:
#   cmake -DINPUT=<file> -DOUTPUT=<header> -DNAME=<identifier> -DSHOWN_AS=<path in the repository>
#         -DTEMPLATE=cmake/embedded_file.hpp.in -P cmake/embed_file.cmake
foreach(required INPUT OUTPUT NAME SHOWN_AS TEMPLATE)
  if(NOT DEFINED ${required})
    message(FATAL_ERROR "embed_file.cmake: pass -D${required}=...")
  endif()
endforeach()

file(READ "${INPUT}" hex HEX)
string(LENGTH "${hex}" hex_length)
if(hex_length EQUAL 0)
  message(FATAL_ERROR "embed_file.cmake: ${INPUT} is empty; there is nothing to embed")
endif()
math(EXPR EMBED_SIZE "${hex_length} / 2")

# 16 bytes a line, each as 0xHH.
string(REPEAT "[0-9a-f]" 32 line_of_hex)
string(REGEX REPLACE "(${line_of_hex})" "\\1\n" hex "${hex}")
string(REGEX REPLACE "([0-9a-f][0-9a-f])" "0x\\1," EMBED_BYTES "${hex}")
string(REGEX REPLACE "\n$" "" EMBED_BYTES "${EMBED_BYTES}")
string(REPLACE "\n" "\n    " EMBED_BYTES "${EMBED_BYTES}")
set(EMBED_NAME "${NAME}")
set(EMBED_SHOWN_AS "${SHOWN_AS}")

# configure_file rewrites the header only when its text changes; the touch
# marks it up to date for the build tool either way.
configure_file("${TEMPLATE}" "${OUTPUT}" @ONLY)
file(TOUCH "${OUTPUT}")
