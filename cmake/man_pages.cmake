# Writes the man pages of `credence` and of each subcommand from the built
# program's own --help (help2man), so a page can never say other than --help.
# Run after every link of the program (CMakeLists.txt, POST_BUILD):
#   cmake -DCREDENCE=<program> -DHELP2MAN=<help2man> -DGZIP=<gzip> -DOUT_DIR=<dir> -P man_pages.cmake
# Writes OUT_DIR/credence.1.gz and OUT_DIR/credence-<subcommand>.1.gz
# (gzip -9n, as Debian policy 12.1 asks), removing pages of subcommands that
# no longer exist. The subcommand list is read from `credence --help`.
cmake_minimum_required(VERSION 3.22)
foreach(var CREDENCE HELP2MAN GZIP OUT_DIR)
  if(NOT ${var})
    message(FATAL_ERROR "man_pages.cmake: ${var} is not set")
  endif()
endforeach()

execute_process(COMMAND "${CREDENCE}" --help OUTPUT_VARIABLE help RESULT_VARIABLE rc)
if(NOT rc EQUAL 0)
  message(FATAL_ERROR "man_pages.cmake: ${CREDENCE} --help exited ${rc}")
endif()

# The first help line is "credence: <what it is>"; the "Subcommands:" section
# lists "  <name>   <description>" until a blank line. Semicolons and square
# brackets would confuse CMake's lists, so they are stood in for while split.
string(ASCII 29 semicolon_stand_in)
string(ASCII 30 open_stand_in)
string(ASCII 31 close_stand_in)
string(REPLACE ";" "${semicolon_stand_in}" help "${help}")
string(REPLACE "[" "${open_stand_in}" help "${help}")
string(REPLACE "]" "${close_stand_in}" help "${help}")
string(REPLACE "\n" ";" lines "${help}")
list(GET lines 0 summary)
string(REGEX REPLACE "^credence: *" "" summary "${summary}")
set(subcommands)
set(in_list FALSE)
foreach(line IN LISTS lines)
  if(line STREQUAL "Subcommands:")
    set(in_list TRUE)
  elseif(in_list AND line MATCHES "^  ([a-z][a-z0-9-]*)  +(.+)$")
    list(APPEND subcommands "${CMAKE_MATCH_1}")
    set(description_${CMAKE_MATCH_1} "${CMAKE_MATCH_2}")
  elseif(in_list)
    break()
  endif()
endforeach()
if(NOT subcommands)
  message(FATAL_ERROR "man_pages.cmake: no subcommands found in `${CREDENCE} --help`")
endif()

file(MAKE_DIRECTORY "${OUT_DIR}")
file(GLOB stale "${OUT_DIR}/*.1" "${OUT_DIR}/*.1.gz")
if(stale)
  file(REMOVE ${stale})
endif()

set(pages credence)
foreach(sub IN LISTS subcommands)
  list(APPEND pages "credence-${sub}")
endforeach()

# help2man wants a NAME line of the form "what it does", lower case first.
function(whatis text out)
  string(REPLACE "${semicolon_stand_in}" ";" text "${text}")
  string(REPLACE "${open_stand_in}" "[" text "${text}")
  string(REPLACE "${close_stand_in}" "]" text "${text}")
  string(SUBSTRING "${text}" 0 1 first)
  string(SUBSTRING "${text}" 1 -1 rest)
  string(TOLOWER "${first}" first)
  set(${out} "${first}${rest}" PARENT_SCOPE)
endfunction()

foreach(page IN LISTS pages)
  if(page STREQUAL "credence")
    set(help_option "--help")
    whatis("${summary}" name)
  else()
    string(REGEX REPLACE "^credence-" "" sub "${page}")
    set(help_option "${sub} --help")
    whatis("${description_${sub}}" name)
  endif()
  execute_process(
    COMMAND "${HELP2MAN}" --no-info --no-discard-stderr --section=1 --manual=Credence
            "--help-option=${help_option}" --version-option=--version "--name=${name}" "${CREDENCE}"
    OUTPUT_VARIABLE roff RESULT_VARIABLE rc ERROR_VARIABLE err)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "man_pages.cmake: help2man failed for ${page}: ${err}")
  endif()
  # help2man titles every page after the program ("CREDENCE", "credence \-");
  # a subcommand's page is named credence-<subcommand>.
  if(NOT page STREQUAL "credence")
    string(TOUPPER "${page}" title)
    string(REPLACE ".TH CREDENCE " ".TH ${title} " roff "${roff}")
    string(REPLACE "\n.SH NAME\ncredence \\- " "\n.SH NAME\n${page} \\- " roff "${roff}")
  endif()
  set(see_also)
  foreach(other IN LISTS pages)
    if(NOT other STREQUAL page)
      list(APPEND see_also ".BR ${other} (1)")
    endif()
  endforeach()
  list(JOIN see_also ",\n" see_also)
  string(APPEND roff ".SH \"SEE ALSO\"\n${see_also}\n")
  file(WRITE "${OUT_DIR}/${page}.1" "${roff}")
  execute_process(COMMAND "${GZIP}" -9nf "${OUT_DIR}/${page}.1" RESULT_VARIABLE rc)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "man_pages.cmake: gzip failed for ${page}.1")
  endif()
endforeach()
list(LENGTH pages count)
message(STATUS "man pages: ${count} written to ${OUT_DIR}")
