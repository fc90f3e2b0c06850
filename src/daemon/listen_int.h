/*
 * listen_int.h: what listen.c (the stream clients: lines, limits,
 * sweeps, drain) and listen_sock.c (the listening sockets: binding TCP,
 * Unix and UDP, reading datagrams, accept backoff) share. Not for use
 * outside them.
 */
#ifndef STOPCOCK_LISTEN_INT_H
#define STOPCOCK_LISTEN_INT_H

#include <sys/types.h>
#include <sys/queue.h>

#include <netinet/in.h>
#include <arpa/inet.h>

#include <event2/listener.h>

#include "daemon.h"

#define LISTEN_BACKLOG 512
#define LISTEN_BAD_MAX 100	/* bad lines before "garbage" may cut */
#define LISTEN_UDP_MAX 65536	/* bytes in one datagram */
#define LISTEN_UDP_BURST 512	/* datagrams per callback, then yield */
#define LISTEN_READ_MAX (1024 * 1024)	/* bytes per read call */
#define LISTEN_DRAIN_MAX (16 * 1024 * 1024)	/* per client at shutdown */
#define LISTEN_UDP_DRAIN 65536	/* datagrams read at shutdown, at most */
#define LISTEN_BACKOFF 1	/* seconds without accept after EMFILE */
#define LISTEN_SWEEP_MS 1000	/* longest time between timeout sweeps */
#define LISTEN_KEY_MAX 17	/* family byte + IPv6 address */

enum client_state {
	CLIENT_READING,		/* lines flow */
	CLIENT_DISCARDING,	/* skipping the rest of an over-long line */
	CLIENT_DEAD		/* closed or cut off; waiting to be reaped */
};

enum listen_cut { CUT_GARBAGE, CUT_FLOOD, CUT_N };

/* Closed for what the client did not do, or to make room. */
enum listen_close { CLOSE_IDLE, CLOSE_SLOW, CLOSE_EVICT, CLOSE_N };

enum listen_refuse { REFUSE_CAP, REFUSE_SOURCE, REFUSE_N };

struct listen_sock {
	struct listen		*l;
	enum source		 src;
	struct evconnlistener	*evl;
	char			*name;		/* address as configured */
};

struct client {
	struct listen		*l;
	enum source		 src;
	enum client_state	 state;
	struct bufferevent	*bev;
	uint64_t		 id;
	uint64_t		 good, bad;
	size_t			 discarded;	/* of the current long line */
	int			 skip_line;	/* signed input: skipping to the
						 * end of a line, not at its
						 * start */
	uint64_t		 last_ms;	/* monotonic, of the last read */
	uint64_t		 line_ms;	/* the unfinished line began */
	int			 unfinished;	/* on l->unfinished */
	uint8_t			 key[LISTEN_KEY_MAX];	/* its source */
	size_t			 keylen;
	char			 peer[INET6_ADDRSTRLEN + 8];
	TAILQ_ENTRY(client)	 entry;		/* by last read, or dead */
	TAILQ_ENTRY(client)	 uentry;	/* by start of its line */
};

TAILQ_HEAD(clients, client);

struct listen {
	struct daemon		*d;
	struct listen_sock	 tcp, unix_sock;
	char			*unix_path;	/* we unlink it at exit */
	ino_t			 unix_ino;
	int			 udp_fd;
	struct event		*udp_ev;
	char			*udp_name;
	char			*udp_buf;
	struct event		*backoff_ev;
	struct event		*reap_ev;
	struct event		*sweep_ev;
	uint64_t		 swept_ms;	/* the last sweep ran */
	uint64_t		 sweep_ms;	/* its period */
	struct clients		 clients[SRC_N];	/* oldest read first */
	struct clients		 unfinished;	/* oldest line first */
	struct clients		 dead;
	struct nmap		*per_source;	/* key -> connections */
	uint32_t		 nclients;
	uint32_t		 nby[SRC_N];
	uint64_t		 next_id;
	int			 draining;

	uint64_t		 accepted[SRC_N];
	uint64_t		 refused[REFUSE_N];
	uint64_t		 backoffs;
	uint64_t		 cut[SRC_N][CUT_N];
	uint64_t		 closed[SRC_N][CLOSE_N];
	uint64_t		 udp_datagrams;
};

/* listen.c: a new stream connection on ls (the evconnlistener's cb). */
void	listen_accept_cb(struct evconnlistener *, evutil_socket_t,
	    struct sockaddr *, int, void *);

/* listen_sock.c */
int	listen_sock_open(struct listen *, char **cause);
void	listen_sock_close(struct listen *);
void	listen_sock_accept(struct listen *, int on);
void	listen_sock_udp_read(struct listen *, int burst);

#endif
