# Installing tickmark (cmake --install build --prefix P) and packaging it
# (cpack: Debian packages). Three components, one Debian package each:
#   server  -> tickmarkd              the server, its systemd unit, its config
#   tools   -> tickmark-tools         the CLI, the trainer sources, profiles
#   dev     -> libtickmark-agent-dev  the agent library (shared and static),
#                                     headers, proto files, CMake and pkg-config
# A new program adds its target to TICKMARK_SERVER_PROGRAMS or
# TICKMARK_TOOL_PROGRAMS below (DEVELOPERS.md, "Installing and packaging").
include(CMakePackageConfigHelpers)

set(TICKMARK_SERVER_PROGRAMS tickmarkd)
set(TICKMARK_TOOL_PROGRAMS tickmark tickmark-keys tickmark-serial tickmark-voice
  tickmark-scripted-agent tickmark-linkemu)
set(TICKMARK_SYSTEMD_UNIT_DIR "lib/systemd/system" CACHE STRING
  "Where the systemd unit goes, relative to the install prefix")

install(TARGETS ${TICKMARK_SERVER_PROGRAMS} RUNTIME DESTINATION ${CMAKE_INSTALL_BINDIR}
  COMPONENT server)
install(TARGETS ${TICKMARK_TOOL_PROGRAMS} RUNTIME DESTINATION ${CMAKE_INSTALL_BINDIR}
  COMPONENT tools)

# --- server: unit, config, data folder -------------------------------------
# deploy/tickmarkd.service is installed as it is. When its ExecStart names
# tickmarkd at another path than the one installed here, a drop-in
# (tickmarkd.service.d/10-install-path.conf, made at install time) starts the
# installed binary with the unit's own arguments.
install(FILES ${PROJECT_SOURCE_DIR}/deploy/tickmarkd.service
  DESTINATION ${TICKMARK_SYSTEMD_UNIT_DIR} COMPONENT server)
# The unit's ExecStart, with its continuation lines (a line ending in "\").
file(STRINGS ${PROJECT_SOURCE_DIR}/deploy/tickmarkd.service TICKMARK_UNIT_LINES)
set(TICKMARK_UNIT_EXEC "")
set(in_exec OFF)
foreach(line IN LISTS TICKMARK_UNIT_LINES)
  if(line MATCHES "^ExecStart=" OR in_exec)
    string(APPEND TICKMARK_UNIT_EXEC "${line}\n")
    set(in_exec OFF)
    if(line MATCHES "\\$")
      set(in_exec ON)
    endif()
  endif()
endforeach()
set_property(DIRECTORY APPEND PROPERTY CMAKE_CONFIGURE_DEPENDS
  ${PROJECT_SOURCE_DIR}/deploy/tickmarkd.service)
# /etc and /var for the /usr prefix (as GNUInstallDirs has it), else under
# the prefix; decided when installing, so `--prefix P` keeps everything in P.
set(TICKMARK_INSTALL_DIRS_CODE [[
  if(CMAKE_INSTALL_PREFIX MATCHES "^/usr/?$")
    set(tickmark_etc "/etc")
    set(tickmark_var "/var")
  else()
    set(tickmark_etc "${CMAKE_INSTALL_PREFIX}/etc")
    set(tickmark_var "${CMAKE_INSTALL_PREFIX}/var")
  endif()
]])
install(CODE "
${TICKMARK_INSTALL_DIRS_CODE}
  file(INSTALL DESTINATION \"\${tickmark_etc}/tickmark\" TYPE FILE
    FILES \"${PROJECT_SOURCE_DIR}/deploy/package/tickmarkd.toml\")
  # The data folder; the package's postinst gives it to the user tickmark.
  set(data \"\$ENV{DESTDIR}\${tickmark_var}/lib/tickmark\")
  file(MAKE_DIRECTORY \"\${data}\")
  file(CHMOD \"\${data}\" DIRECTORY_PERMISSIONS OWNER_READ OWNER_WRITE OWNER_EXECUTE
    GROUP_READ GROUP_EXECUTE)
  set(exec [==[${TICKMARK_UNIT_EXEC}]==])
  set(bin \"\${CMAKE_INSTALL_PREFIX}/${CMAKE_INSTALL_BINDIR}/tickmarkd\")
  string(REGEX REPLACE \"^ExecStart=[^ ]*tickmarkd\" \"ExecStart=\${bin}\" wanted \"\${exec}\")
  if(NOT exec STREQUAL wanted)
    set(dropin \"\$ENV{DESTDIR}\${CMAKE_INSTALL_PREFIX}/${TICKMARK_SYSTEMD_UNIT_DIR}/tickmarkd.service.d\")
    file(WRITE \"\${dropin}/10-install-path.conf\"
      \"# Made by cmake --install: tickmarkd.service names tickmarkd at another path.\\n[Service]\\nExecStart=\\n\${wanted}\")
  endif()
" COMPONENT server)
install(FILES ${PROJECT_SOURCE_DIR}/deploy/tickmarkd.toml
  DESTINATION ${CMAKE_INSTALL_DATADIR}/tickmark/examples COMPONENT server)

# --- tools: profiles --------------------------------------------------------
foreach(source keys serial voice)
  install(DIRECTORY ${PROJECT_SOURCE_DIR}/clients/${source}/profiles/
    DESTINATION ${CMAKE_INSTALL_DATADIR}/tickmark/profiles/${source} COMPONENT tools
    FILES_MATCHING PATTERN "*.toml")
endforeach()

# --- dev: the agent library, headers, proto files, package config ------------
install(TARGETS tickmark_agent_shared tickmark_agent_static EXPORT tickmarkTargets
  LIBRARY DESTINATION ${CMAKE_INSTALL_LIBDIR} COMPONENT dev NAMELINK_COMPONENT dev
  ARCHIVE DESTINATION ${CMAKE_INSTALL_LIBDIR} COMPONENT dev)
# Headers keep their paths in the tree under include/tickmark/, so
# `#include "clients/agent/agent.h"` works installed and in the tree alike.
set(TICKMARK_INCLUDE_DIR ${CMAKE_INSTALL_INCLUDEDIR}/tickmark)
foreach(header clients/agent/agent.h clients/common/stream_client.h
    server/core/disciplined_clock.h server/core/time.h)
  get_filename_component(dir ${header} DIRECTORY)
  install(FILES ${PROJECT_SOURCE_DIR}/${header} DESTINATION ${TICKMARK_INCLUDE_DIR}/${dir}
    COMPONENT dev)
endforeach()
install(FILES ${CMAKE_BINARY_DIR}/generated/tickmark/version.h
  DESTINATION ${TICKMARK_INCLUDE_DIR}/tickmark COMPONENT dev)
foreach(p records admin stream)
  install(FILES ${CMAKE_BINARY_DIR}/proto/tickmark/v1/${p}.pb.h
    ${CMAKE_BINARY_DIR}/proto/tickmark/v1/${p}.grpc.pb.h
    DESTINATION ${TICKMARK_INCLUDE_DIR}/tickmark/v1 COMPONENT dev)
endforeach()
install(DIRECTORY ${PROJECT_SOURCE_DIR}/proto/tickmark
  DESTINATION ${CMAKE_INSTALL_DATADIR}/tickmark/proto COMPONENT dev
  FILES_MATCHING PATTERN "*.proto")

set(TICKMARK_CMAKE_DIR ${CMAKE_INSTALL_LIBDIR}/cmake/tickmark)
install(EXPORT tickmarkTargets NAMESPACE tickmark:: DESTINATION ${TICKMARK_CMAKE_DIR}
  COMPONENT dev)
configure_package_config_file(${PROJECT_SOURCE_DIR}/cmake/tickmarkConfig.cmake.in
  ${CMAKE_BINARY_DIR}/packaging/tickmarkConfig.cmake INSTALL_DESTINATION ${TICKMARK_CMAKE_DIR})
# 0.x: a consumer asking for 0.1 gets 0.1.y only (docs/compatibility.md).
write_basic_package_version_file(${CMAKE_BINARY_DIR}/packaging/tickmarkConfigVersion.cmake
  COMPATIBILITY SameMinorVersion)
install(FILES ${CMAKE_BINARY_DIR}/packaging/tickmarkConfig.cmake
  ${CMAKE_BINARY_DIR}/packaging/tickmarkConfigVersion.cmake
  DESTINATION ${TICKMARK_CMAKE_DIR} COMPONENT dev)
# pkg-config: paths relative to the .pc file, so any prefix works.
file(RELATIVE_PATH TICKMARK_PC_TO_PREFIX /p/${CMAKE_INSTALL_LIBDIR}/pkgconfig /p)
string(REGEX REPLACE "/$" "" TICKMARK_PC_TO_PREFIX "${TICKMARK_PC_TO_PREFIX}")
configure_file(${PROJECT_SOURCE_DIR}/cmake/tickmark-agent.pc.in
  ${CMAKE_BINARY_DIR}/packaging/tickmark-agent.pc @ONLY)
install(FILES ${CMAKE_BINARY_DIR}/packaging/tickmark-agent.pc
  DESTINATION ${CMAKE_INSTALL_LIBDIR}/pkgconfig COMPONENT dev)

# --- Debian packages (cpack -G DEB; ./run package) ---------------------------
set(CPACK_PACKAGE_NAME tickmark)
set(CPACK_PACKAGE_VENDOR "tickmark")
set(CPACK_PACKAGE_CONTACT "tickmark maintainers <tickmark@localhost>")
set(CPACK_PACKAGE_VERSION ${PROJECT_VERSION})
set(CPACK_PACKAGE_DESCRIPTION_SUMMARY "human evaluative feedback for learning agents")
set(CPACK_PACKAGING_INSTALL_PREFIX /usr)
set(CPACK_GENERATOR DEB)
set(CPACK_DEB_COMPONENT_INSTALL ON)
set(CPACK_COMPONENTS_ALL server tools dev)
set(CPACK_DEBIAN_FILE_NAME DEB-DEFAULT)
set(CPACK_DEBIAN_PACKAGE_SECTION science)
# Debian runtime libraries through dpkg-shlibdeps (dpkg-dev).
set(CPACK_DEBIAN_PACKAGE_SHLIBDEPS ON)
set(CPACK_DEBIAN_PACKAGE_GENERATE_SHLIBS ON)
set(CPACK_DEBIAN_SERVER_PACKAGE_NAME tickmarkd)
set(CPACK_DEBIAN_SERVER_PACKAGE_DEPENDS "adduser")
set(CPACK_DEBIAN_SERVER_DESCRIPTION
  "tickmark server: human evaluative feedback for learning agents
 tickmarkd takes approve/disapprove feedback from trainers and steps from
 agents over gRPC, maps every time onto one session timeline, credits
 feedback to agent steps and keeps everything in a hash-chained ledger.
 Runs as the system user tickmark (systemd unit tickmarkd.service); the
 ledger lives in /var/lib/tickmark, the configuration in /etc/tickmark.")
set(CPACK_DEBIAN_SERVER_PACKAGE_CONTROL_EXTRA
  ${PROJECT_SOURCE_DIR}/deploy/package/postinst ${PROJECT_SOURCE_DIR}/deploy/package/prerm
  ${PROJECT_SOURCE_DIR}/deploy/package/postrm ${PROJECT_SOURCE_DIR}/deploy/package/conffiles)
set(CPACK_DEBIAN_PACKAGE_CONTROL_STRICT_PERMISSION ON)
set(CPACK_DEBIAN_TOOLS_PACKAGE_NAME tickmark-tools)
# tickmark-voice reads pocketsphinx's acoustic model at run time.
set(CPACK_DEBIAN_TOOLS_PACKAGE_DEPENDS "pocketsphinx-en-us")
set(CPACK_DEBIAN_TOOLS_DESCRIPTION
  "tickmark command line and trainer sources
 The tickmark operator CLI and the feedback sources tickmark-keys (keys,
 clickers, pedals, gamepads), tickmark-serial (response boxes) and
 tickmark-voice (spoken phrases), with their ready profiles in
 /usr/share/tickmark/profiles.")
set(CPACK_DEBIAN_DEV_PACKAGE_NAME libtickmark-agent-dev)
set(CPACK_DEBIAN_DEV_PACKAGE_SECTION libdevel)
# The headers include gRPC, protobuf and abseil; the CMake package config
# finds them again.
set(CPACK_DEBIAN_DEV_PACKAGE_DEPENDS
  "libgrpc++-dev, libprotobuf-dev, protobuf-compiler-grpc, libabsl-dev, libssl-dev")
set(CPACK_DEBIAN_DEV_DESCRIPTION
  "tickmark agent library (C++): connect a learner to a tickmark session
 tickmark::agent publishes an agent's steps and reads back credit and
 settled labels. Shared and static library, headers, the wire contract's
 proto files, a CMake package (find_package(tickmark)) and pkg-config
 (tickmark-agent).")
include(CPack)
