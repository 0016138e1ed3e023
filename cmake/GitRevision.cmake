# Writes the generated app/version.h at build time (cmake -P, run by the
# skerry_version target on every build): the git revision of the source tree
# and "-dirty" when tracked files differ from it. configure_file leaves the
# header untouched when its content is unchanged, so only a new revision (or a
# change between clean and dirty) recompiles the files that include it.
#   -DSRC=source dir -DIN=version.h.in -DOUT=generated header
#   -DPROJECT_VERSION=x.y.z [-DGIT=git executable]
if(NOT GIT)
  set(GIT git)
endif()
set(SKERRY_GIT_REVISION "")
execute_process(COMMAND ${GIT} rev-parse --short=12 HEAD WORKING_DIRECTORY ${SRC}
                OUTPUT_VARIABLE SKERRY_GIT_REVISION RESULT_VARIABLE _rc
                OUTPUT_STRIP_TRAILING_WHITESPACE ERROR_QUIET)
if(NOT _rc EQUAL 0 OR NOT SKERRY_GIT_REVISION)
  set(SKERRY_GIT_REVISION "unknown")  # not a git checkout (e.g. an unpacked release)
else()
  # --no-optional-locks: never take the index lock a concurrent git command holds.
  execute_process(COMMAND ${GIT} --no-optional-locks status --porcelain --untracked-files=no
                  WORKING_DIRECTORY ${SRC} OUTPUT_VARIABLE _status RESULT_VARIABLE _rc ERROR_QUIET)
  if(NOT _rc EQUAL 0 OR _status)
    string(APPEND SKERRY_GIT_REVISION "-dirty")
  endif()
endif()
configure_file(${IN} ${OUT} @ONLY)
