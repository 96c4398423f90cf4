// The one place that decides what a network address is: the host part of a
// "host:port" target and whether a host is loopback. Used by tickmarkd (may
// it serve plaintext?), the clients (may they connect without TLS?) and the
// link emulator (may it listen there?).
//
// A host is loopback when it parses as an IP address in 127.0.0.0/8 or ::1
// (RFC 1122 §3.2.1.3, RFC 4291 §2.5.3), or when it is the name "localhost"
// (RFC 6761 §6.3 reserves it for loopback). Any other name, such as
// "127.example.org", is not loopback: names are never guessed from their
// spelling.
//
// Thread safety: pure functions.
#ifndef TICKMARK_SERVER_NET_ADDRESS_H_
#define TICKMARK_SERVER_NET_ADDRESS_H_

#include <string>
#include <string_view>

namespace tickmark::net {

// "host:port" -> "host"; "[v6]:port" and "[v6]" -> "v6"; a bare IPv6
// address (several colons, no brackets) is returned whole; "host" -> "host".
std::string HostOf(std::string_view host_port);

// True for an IP literal in 127.0.0.0/8 or ::1 (also ::ffff:127.x.y.z) and
// for the name "localhost" (any case). False for every other name.
bool IsLoopbackHost(std::string_view host);

// IsLoopbackHost(HostOf(host_port)).
bool IsLoopbackTarget(std::string_view host_port);

}  // namespace tickmark::net

#endif  // TICKMARK_SERVER_NET_ADDRESS_H_
