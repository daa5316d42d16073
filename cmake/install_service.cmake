# Installs the example config and the systemd unit; runs at install time
# (cmake/package.cmake), when the real prefix is known. Needs
# CMAKE_INSTALL_PREFIX (set by the install), CREDENCE_SOURCE_DIR,
# CREDENCE_STAGING_DIR (a scratch folder in the build tree) and CREDENCE_BINDIR.
# The prefix /usr gets the Debian layout (/etc, /lib/systemd/system; the FHS
# and Debian policy 10.7.2, 9.3); any other prefix keeps everything under it.
if(CMAKE_INSTALL_PREFIX STREQUAL "/usr")
  set(sysconf_dir /etc)
  set(unit_dir /lib/systemd/system)
else()
  set(sysconf_dir "${CMAKE_INSTALL_PREFIX}/etc")
  set(unit_dir "${CMAKE_INSTALL_PREFIX}/lib/systemd/system")
endif()
set(SYSCONFDIR "${sysconf_dir}")
set(CONFIG_FILE "${sysconf_dir}/credence/credence.toml")
set(BINDIR "${CMAKE_INSTALL_PREFIX}/${CREDENCE_BINDIR}")
configure_file("${CREDENCE_SOURCE_DIR}/config/systemd/credence.service.in"
  "${CREDENCE_STAGING_DIR}/credence.service" @ONLY)
# file(INSTALL) puts $DESTDIR in front of these, as install() does.
file(INSTALL DESTINATION "${sysconf_dir}/credence" TYPE FILE PERMISSIONS OWNER_READ OWNER_WRITE GROUP_READ WORLD_READ
  FILES "${CREDENCE_SOURCE_DIR}/config/credence.toml")
file(INSTALL DESTINATION "${unit_dir}" TYPE FILE PERMISSIONS OWNER_READ OWNER_WRITE GROUP_READ WORLD_READ
  FILES "${CREDENCE_STAGING_DIR}/credence.service")
