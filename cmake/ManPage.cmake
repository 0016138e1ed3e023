# Generates the man page skerry.1 at build time (cmake -P, run after the skerry
# executable is linked) from `skerry --help` and every sub-command's --help, so
# the page always says what the binary does.
#   -DSKERRY=path of the executable -DOUT=skerry.1 -DPROJECT_VERSION=x.y.z
execute_process(COMMAND ${SKERRY} --help OUTPUT_VARIABLE _top RESULT_VARIABLE _rc)
if(NOT _rc EQUAL 0)
  message(FATAL_ERROR "${SKERRY} --help exited with ${_rc}")
endif()

# roff-escape a block of --help text and keep it verbatim (.nf/.fi).
function(_roff_block text out)
  string(REPLACE "\\" "\\e" text "${text}")
  string(REGEX REPLACE "(^|\n)([.'])" "\\1\\\\&\\2" text "${text}")
  set(${out} ".nf\n${text}\n.fi\n" PARENT_SCOPE)
endfunction()

# Sub-command names: the indented lines after "sub-commands:" up to a blank line.
string(REGEX MATCH "sub-commands:\n(.*)" _m "${_top}")
string(REGEX REPLACE "\n\n.*" "" _list "${CMAKE_MATCH_1}")
string(REPLACE "\n" ";" _lines "${_list}")
set(_cmds "")
foreach(_l IN LISTS _lines)
  if(_l MATCHES "^  ([a-z][a-z0-9_-]*)")
    list(APPEND _cmds ${CMAKE_MATCH_1})
  endif()
endforeach()
if(NOT _cmds)
  message(FATAL_ERROR "no sub-commands found in `${SKERRY} --help`")
endif()

_roff_block("${_top}" _top_roff)
set(_page ".TH SKERRY 1 \"\" \"skerry ${PROJECT_VERSION}\" \"User Commands\"\n")
string(APPEND _page ".SH NAME\nskerry \\- radio continuum images to source catalogues\n")
string(APPEND _page ".SH SYNOPSIS\n.B skerry\n.I sub-command\n[\\fIoptions\\fR]\n")
string(APPEND _page ".SH DESCRIPTION\n${_top_roff}")
foreach(_c IN LISTS _cmds)
  execute_process(COMMAND ${SKERRY} ${_c} --help OUTPUT_VARIABLE _h RESULT_VARIABLE _rc)
  if(NOT _rc EQUAL 0)
    message(FATAL_ERROR "${SKERRY} ${_c} --help exited with ${_rc}")
  endif()
  _roff_block("${_h}" _h_roff)
  string(TOUPPER "${_c}" _C)
  string(APPEND _page ".SH SKERRY ${_C}\n${_h_roff}")
endforeach()
string(APPEND _page ".SH FILES\nExample configurations and the documentation (README.md, docs/REFERENCES.md,\n"
       "docs/CONVENTIONS.md) are installed under share/doc/skerry.\n")
file(WRITE ${OUT} "${_page}")
