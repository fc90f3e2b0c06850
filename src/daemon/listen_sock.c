/*
 * listen_sock.c: the listening sockets of listen.c. TCP and Unix stream
 * sockets are evconnlisteners whose new connections go to
 * listen_accept_cb; the Unix socket replaces a stale file but never a
 * live one, and gets unix_mode and unix_group at bind. The UDP socket is
 * read in bursts of LISTEN_UDP_BURST datagrams so one flood cannot hold
 * the loop. When accept fails for lack of descriptors every listener
 * pauses for LISTEN_BACKOFF seconds instead of spinning on the error.
 */
#include <sys/types.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <sys/un.h>

#include <errno.h>
#include <netdb.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <event2/event.h>

#include "stopcock/addr.h"
#include "stopcock/log.h"
#include "listen_int.h"

void
listen_sock_accept(struct listen *l, int on)
{
	struct listen_sock *socks[] = { &l->tcp, &l->unix_sock };
	size_t i;

	for (i = 0; i < SC_NELEM(socks); i++) {
		if (socks[i]->evl == NULL)
			continue;
		if (on)
			evconnlistener_enable(socks[i]->evl);
		else
			evconnlistener_disable(socks[i]->evl);
	}
}

static void
listen_sock_backoff_cb(evutil_socket_t fd, short what, void *arg)
{
	struct listen *l = arg;

	if (l->draining)
		return;
	log_info("listen: accepting again after backoff");
	listen_sock_accept(l, 1);
}

/* Out of descriptors: stop accepting for a while rather than spin. */
static void
listen_sock_error_cb(struct evconnlistener *evl, void *arg)
{
	struct listen_sock *ls = arg;
	struct listen *l = ls->l;
	int err = EVUTIL_SOCKET_ERROR();
	struct timeval tv = { LISTEN_BACKOFF, 0 };

	if (err == EMFILE || err == ENFILE || err == ENOBUFS || err == ENOMEM) {
		l->backoffs++;
		log_warnx("listen: accept: %s; pausing accept for %ds "
		    "source=%s clients=%u", strerror(err), LISTEN_BACKOFF,
		    source_name(ls->src), l->nclients);
		listen_sock_accept(l, 0);
		event_add(l->backoff_ev, &tv);
		return;
	}
	log_warnx("listen: accept: %s source=%s", strerror(err),
	    source_name(ls->src));
}

/* "host:port" or "[v6]:port" (addr.h) to a socket address. */
static int
listen_sock_resolve(const char *spec, int socktype, struct sockaddr_storage *ss,
    socklen_t *sslen, char **cause)
{
	struct addrinfo hints, *res;
	struct addr a;
	char port[8];
	int rc;

	if (addr_parse(spec, 0, &a, cause) != 0)
		return -1;
	snprintf(port, sizeof port, "%u", (unsigned)a.port);
	memset(&hints, 0, sizeof hints);
	hints.ai_family = AF_UNSPEC;
	hints.ai_socktype = socktype;
	hints.ai_flags = AI_PASSIVE | AI_NUMERICSERV;
	rc = getaddrinfo(a.host, port, &hints, &res);
	if (rc != 0) {
		xasprintf(cause, "%s: %s", spec, gai_strerror(rc));
		return -1;
	}
	memcpy(ss, res->ai_addr, res->ai_addrlen);
	*sslen = res->ai_addrlen;
	freeaddrinfo(res);
	return 0;
}

static int
listen_sock_stream(struct listen *l, struct listen_sock *ls, enum source src,
    const struct sockaddr *sa, socklen_t salen, unsigned flags,
    const char *name, char **cause)
{
	ls->l = l;
	ls->src = src;
	ls->name = xstrdup(name);
	ls->evl = evconnlistener_new_bind(l->d->base, listen_accept_cb, ls,
	    LEV_OPT_CLOSE_ON_FREE | LEV_OPT_CLOSE_ON_EXEC | flags,
	    LISTEN_BACKLOG, sa, (int)salen);
	if (ls->evl == NULL) {
		xasprintf(cause, "%s %s: %s", source_name(src), name,
		    strerror(errno));
		return -1;
	}
	evconnlistener_set_error_cb(ls->evl, listen_sock_error_cb);
	log_info("listen: accepting source=%s address=%s", source_name(src),
	    name);
	return 0;
}

static int
listen_sock_tcp(struct listen *l, const char *spec, char **cause)
{
	struct sockaddr_storage ss;
	socklen_t sslen;

	if (listen_sock_resolve(spec, SOCK_STREAM, &ss, &sslen, cause) != 0)
		return -1;
	return listen_sock_stream(l, &l->tcp, SRC_TCP, (struct sockaddr *)&ss,
	    sslen, LEV_OPT_REUSEABLE, spec, cause);
}

/* Bind the Unix socket, replacing a stale one but never a live one. */
static int
listen_sock_unix(struct listen *l, const char *path, char **cause)
{
	struct sockaddr_un sun;
	struct stat st;
	unsigned gid;
	int fd;

	memset(&sun, 0, sizeof sun);
	sun.sun_family = AF_UNIX;
	if (strlen(path) >= sizeof sun.sun_path) {
		xasprintf(cause, "unix %s: path too long", path);
		return -1;
	}
	strcpy(sun.sun_path, path);
	if (lstat(path, &st) == 0) {
		if (!S_ISSOCK(st.st_mode)) {
			xasprintf(cause, "unix %s: exists and is not a socket",
			    path);
			return -1;
		}
		fd = socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
		if (fd != -1 && connect(fd, (struct sockaddr *)&sun,
		    sizeof sun) == 0) {
			close(fd);
			xasprintf(cause, "unix %s: in use by another process",
			    path);
			return -1;
		}
		if (fd != -1)
			close(fd);
		if (unlink(path) != 0) {
			xasprintf(cause, "unix %s: cannot remove stale socket: "
			    "%s", path, strerror(errno));
			return -1;
		}
		log_info("listen: removed stale socket path=%s", path);
	}
	if (listen_sock_stream(l, &l->unix_sock, SRC_UNIX, (struct sockaddr *)&sun,
	    sizeof sun, 0, path, cause) != 0)
		return -1;
	/* who may write records here: the socket's mode and group */
	if (l->d->conf->unix_group != NULL) {
		if (conf_unix_group(l->d->conf->unix_group, &gid, cause) != 0)
			return -1;
		if (chown(path, (uid_t)-1, (gid_t)gid) != 0) {
			xasprintf(cause, "unix %s: unix_group %s: chown: %s",
			    path, l->d->conf->unix_group, strerror(errno));
			return -1;
		}
	}
	if (chmod(path, (mode_t)l->d->conf->unix_mode) != 0 ||
	    lstat(path, &st) != 0) {
		xasprintf(cause, "unix %s: unix_mode %04o: %s", path,
		    (unsigned)l->d->conf->unix_mode, strerror(errno));
		return -1;
	}
	log_info("listen: unix socket path=%s mode=%04o group=%u", path,
	    (unsigned)(st.st_mode & 07777), (unsigned)st.st_gid);
	l->unix_path = xstrdup(path);
	l->unix_ino = st.st_ino;
	return 0;
}

/* Read up to burst datagrams, fewer when the socket runs dry. */
void
listen_sock_udp_read(struct listen *l, int burst)
{
	ssize_t n;
	int i;

	for (i = 0; i < burst; i++) {
		n = recv(l->udp_fd, l->udp_buf, LISTEN_UDP_MAX, MSG_TRUNC);
		if (n == -1) {
			if (errno == EINTR)
				continue;
			if (errno != EAGAIN && errno != EWOULDBLOCK)
				log_warn("listen: udp recv");
			return;
		}
		l->udp_datagrams++;
		if ((size_t)n > LISTEN_UDP_MAX) {
			ingest_reject(l->d, SRC_UDP, PROTO_E_LONG, (size_t)n,
			    l->udp_buf, 80);
			continue;
		}
		if (auth_signed(l->d->conf, SRC_UDP))
			(void)auth_datagram(l->d, SRC_UDP, l->udp_buf,
			    (size_t)n);
		else
			ingest_lines(l->d, SRC_UDP, l->udp_buf, (size_t)n);
	}
}

static void
listen_sock_udp_cb(evutil_socket_t fd, short what, void *arg)
{
	struct listen *l = arg;

	listen_sock_udp_read(l, LISTEN_UDP_BURST);
}

static int
listen_sock_udp(struct listen *l, const char *spec, char **cause)
{
	struct sockaddr_storage ss;
	socklen_t sslen;
	int size = 4 * 1024 * 1024;

	if (listen_sock_resolve(spec, SOCK_DGRAM, &ss, &sslen, cause) != 0)
		return -1;
	l->udp_fd = socket(ss.ss_family, SOCK_DGRAM | SOCK_NONBLOCK |
	    SOCK_CLOEXEC, 0);
	if (l->udp_fd == -1) {
		xasprintf(cause, "udp %s: socket: %s", spec, strerror(errno));
		return -1;
	}
	/* Best effort: a deeper queue rides out bursts; the kernel caps it
	 * at net.core.rmem_max. */
	(void)setsockopt(l->udp_fd, SOL_SOCKET, SO_RCVBUF, &size, sizeof size);
	if (bind(l->udp_fd, (struct sockaddr *)&ss, sslen) != 0) {
		xasprintf(cause, "udp %s: %s", spec, strerror(errno));
		return -1;
	}
	l->udp_buf = xmalloc(LISTEN_UDP_MAX);
	l->udp_name = xstrdup(spec);
	l->udp_ev = event_new(l->d->base, l->udp_fd, EV_READ | EV_PERSIST,
	    listen_sock_udp_cb, l);
	if (l->udp_ev == NULL || event_add(l->udp_ev, NULL) != 0) {
		xasprintf(cause, "udp %s: cannot add event", spec);
		return -1;
	}
	log_info("listen: accepting source=udp address=%s", spec);
	return 0;
}

/* Bind what the configuration names; *cause says what failed. */
int
listen_sock_open(struct listen *l, char **cause)
{
	const struct conf *conf = l->d->conf;

	l->backoff_ev = evtimer_new(l->d->base, listen_sock_backoff_cb, l);
	if (l->backoff_ev == NULL) {
		*cause = xstrdup("cannot create the accept backoff event");
		return -1;
	}
	if (conf->tcp != NULL && listen_sock_tcp(l, conf->tcp, cause) != 0)
		return -1;
	if (conf->udp != NULL && listen_sock_udp(l, conf->udp, cause) != 0)
		return -1;
	if (conf->unix_path != NULL &&
	    listen_sock_unix(l, conf->unix_path, cause) != 0)
		return -1;
	return 0;
}

/* Close every listening socket (after the clients are gone). */
void
listen_sock_close(struct listen *l)
{
	struct stat st;

	if (l->tcp.evl != NULL)
		evconnlistener_free(l->tcp.evl);
	if (l->unix_sock.evl != NULL)
		evconnlistener_free(l->unix_sock.evl);
	/* Remove the socket file only if it is still the one we bound. */
	if (l->unix_path != NULL && lstat(l->unix_path, &st) == 0 &&
	    st.st_ino == l->unix_ino)
		unlink(l->unix_path);
	if (l->udp_ev != NULL)
		event_free(l->udp_ev);
	if (l->udp_fd != -1)
		close(l->udp_fd);
	if (l->backoff_ev != NULL)
		event_free(l->backoff_ev);
	free(l->tcp.name);
	free(l->unix_sock.name);
	free(l->unix_path);
	free(l->udp_name);
	free(l->udp_buf);
}
