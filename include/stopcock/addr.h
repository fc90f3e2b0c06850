/*
 * addr.h: the one parser of the addresses stopcock is told to listen on
 * or connect to ([daemon] tcp, udp, http, [redis] address, Kafka
 * brokers). Two forms only: "host:port" (a name or an IPv4 address,
 * port 1-65535) and "[v6]:port"; where a socket path makes sense the
 * caller allows a third, an absolute path. Pure string work: no name is
 * resolved and no socket is made here.
 */
#ifndef STOPCOCK_ADDR_H
#define STOPCOCK_ADDR_H

#include <stdint.h>

#define ADDR_HOST_MAX	253	/* a DNS name's longest text */
#define ADDR_PATH_MAX	107	/* sun_path holds 108 with the NUL */

#define ADDR_PATH_OK	0x1	/* an absolute socket path is allowed */

struct addr {
	int		 is_path;	/* 1: path is set, host and port not */
	char		 host[ADDR_HOST_MAX + 1];	/* v6 without [] */
	uint16_t	 port;
	char		 path[ADDR_PATH_MAX + 1];
};

/* 0, or -1 with *cause (which names s and the forms accepted). */
int		 addr_parse(const char *s, unsigned flags, struct addr *,
		    char **cause);

#endif
