# What `cmake --install` places and what `cpack -G DEB` packages; included by
# CMakeLists.txt. With the installation prefix P (/usr/local by default, /usr
# in the Debian package):
#   P/bin/credence                        the program
#   P/share/man/man1/credence*.1.gz       one page per subcommand, from --help
#   SYSCONF/credence/credence.toml        the example config (config/credence.toml)
#   UNITS/credence.service                the systemd unit (config/systemd)
#   P/share/doc/credence/                 copyright, changelog, examples (Prometheus)
# where SYSCONF is /etc and UNITS /lib/systemd/system when P is /usr (the
# Debian layout), else P/etc and P/lib/systemd/system. Those two are decided
# when installing (cmake/install_service.cmake), so `cmake --install --prefix`
# and CPack, which install with their own prefixes, both get them right.
include(GNUInstallDirs)
# Installing (and cpack) takes what is built; it does not build the tests first.
set(CMAKE_SKIP_INSTALL_ALL_DEPENDENCY TRUE)

install(TARGETS credence RUNTIME DESTINATION ${CMAKE_INSTALL_BINDIR})

# ---- man pages: written from the program's own --help after every link, so
# they cannot drift from it (cmake/man_pages.cmake).
option(CREDENCE_MAN_PAGES "Write man pages with help2man after each link of credence" ON)
if(CREDENCE_MAN_PAGES)
  find_program(CREDENCE_HELP2MAN help2man)
  find_program(CREDENCE_GZIP gzip)
  if(NOT CREDENCE_HELP2MAN OR NOT CREDENCE_GZIP)
    message(FATAL_ERROR "help2man or gzip is missing: run scripts/setup.sh (apt-get install help2man), "
                        "or configure with -DCREDENCE_MAN_PAGES=OFF to build without man pages")
  endif()
  add_custom_command(TARGET credence POST_BUILD
    COMMAND ${CMAKE_COMMAND} -DCREDENCE=$<TARGET_FILE:credence> -DHELP2MAN=${CREDENCE_HELP2MAN}
      -DGZIP=${CREDENCE_GZIP} -DOUT_DIR=${PROJECT_BINARY_DIR}/man -P ${PROJECT_SOURCE_DIR}/cmake/man_pages.cmake
    VERBATIM)
  install(DIRECTORY ${PROJECT_BINARY_DIR}/man/ DESTINATION ${CMAKE_INSTALL_MANDIR}/man1
    FILES_MATCHING PATTERN "*.1.gz")
endif()

# ---- the example config and the systemd unit, at paths decided when installing
install(CODE "
  set(CREDENCE_SOURCE_DIR \"${PROJECT_SOURCE_DIR}\")
  set(CREDENCE_STAGING_DIR \"${PROJECT_BINARY_DIR}/install-staging\")
  set(CREDENCE_BINDIR \"${CMAKE_INSTALL_BINDIR}\")
  include(\"${PROJECT_SOURCE_DIR}/cmake/install_service.cmake\")")

# ---- documents: the Debian copyright file (from LICENSE) and changelog, and
# the examples an operator starts from
set(CPACK_DEBIAN_PACKAGE_MAINTAINER "Credence maintainers <maintainers@credence.invalid>" CACHE STRING
  "Maintainer field of the Debian package and its changelog")
file(READ ${PROJECT_SOURCE_DIR}/LICENSE license_text)
string(REGEX MATCH "Copyright \\(c\\) ([^\n]+)" _ "${license_text}")
set(CREDENCE_COPYRIGHT "${CMAKE_MATCH_1}")
# The license body after its title and copyright line, in the copyright
# format's continuation lines (a space in front, " ." for an empty line).
string(REGEX REPLACE "^[^\n]*\n\n[^\n]*\n\n" "" license_body "${license_text}")
string(STRIP "${license_body}" license_body)
string(REPLACE "\n" "\n " license_body " ${license_body}")
string(REPLACE "\n \n" "\n .\n" CREDENCE_LICENSE_TEXT "${license_body}")
set_property(DIRECTORY APPEND PROPERTY CMAKE_CONFIGURE_DEPENDS ${PROJECT_SOURCE_DIR}/LICENSE)
string(TIMESTAMP CREDENCE_CHANGELOG_DATE "%a, %d %b %Y %H:%M:%S +0000" UTC)
set(doc_dir ${PROJECT_BINARY_DIR}/packaging)
configure_file(${PROJECT_SOURCE_DIR}/packaging/debian/copyright.in ${doc_dir}/copyright @ONLY)
configure_file(${PROJECT_SOURCE_DIR}/packaging/debian/changelog.in ${doc_dir}/changelog @ONLY)
execute_process(COMMAND gzip -9nc ${doc_dir}/changelog OUTPUT_FILE ${doc_dir}/changelog.gz COMMAND_ERROR_IS_FATAL ANY)
install(FILES ${doc_dir}/copyright ${doc_dir}/changelog.gz DESTINATION ${CMAKE_INSTALL_DOCDIR})
install(DIRECTORY ${PROJECT_SOURCE_DIR}/config/prometheus DESTINATION ${CMAKE_INSTALL_DOCDIR}/examples
  OPTIONAL)

# ---- the Debian package: `cpack -G DEB` in the build folder
set(CPACK_PACKAGE_NAME credence)
set(CPACK_PACKAGE_VENDOR "The Credence authors")
set(CPACK_PACKAGE_CONTACT "${CPACK_DEBIAN_PACKAGE_MAINTAINER}")
set(CPACK_PACKAGE_DESCRIPTION_SUMMARY "recommendations with honest uncertainty from a shop's ratings")
# The control file's Description: the summary above as its first line, then this.
set(CPACK_DEBIAN_PACKAGE_DESCRIPTION "Credence fits a Bayesian low-rank factor model to a shop's exported customer
ratings by Gibbs sampling and serves recommendations over HTTP. Every
predicted rating comes with a standard deviation and a credible interval;
top-N lists can rank by the mean, a cautious lower bound or a posterior draw.
.
This package holds the credence program, its man pages, an example
configuration and a systemd unit for credence serve.")
set(CPACK_DEBIAN_FILE_NAME DEB-DEFAULT)
set(CPACK_DEBIAN_PACKAGE_SECTION science)
set(CPACK_DEBIAN_PACKAGE_PRIORITY optional)
set(CPACK_DEBIAN_PACKAGE_SHLIBDEPS ON)
set(CPACK_DEBIAN_PACKAGE_GENERATE_SHLIBS OFF)
set(CPACK_DEBIAN_PACKAGE_CONTROL_STRICT_PERMISSION ON)
set(CPACK_DEBIAN_PACKAGE_CONTROL_EXTRA ${PROJECT_SOURCE_DIR}/packaging/debian/conffiles)
# Installed with DESTDIR and the prefix /usr, so the install-time script sees
# the prefix the package will have (cmake/install_service.cmake).
set(CPACK_SET_DESTDIR ON)
set(CPACK_INSTALL_PREFIX /usr)
set(CPACK_PACKAGING_INSTALL_PREFIX /usr)
set(CPACK_STRIP_FILES ON)
set(CPACK_GENERATOR DEB)
include(CPack)
