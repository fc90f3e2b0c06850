/*
 * notify.c: the systemd notification protocol (sd_notify(3)) without
 * ever blocking the loop. libsystemd's sd_notify sends on a blocking
 * socket: when nobody reads $NOTIFY_SOCKET and its queue is full (ten
 * datagrams by default), the send waits for good and so would the whole
 * daemon. Here one non-blocking datagram socket is opened at start and
 * every message is sent with MSG_DONTWAIT: a full queue costs that
 * message only, counted and logged. READY=1 is the one message whose loss
 * would matter (systemd waits for it), so it is sent again on the status
 * timer until the socket takes it.
 *
 * No $NOTIFY_SOCKET (not under systemd): every call is a no-op.
 */
#include <sys/socket.h>
#include <sys/un.h>

#include <errno.h>
#include <inttypes.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "stopcock/log.h"
#include "daemon.h"

#define NOTIFY_MAX 1024		/* bytes of one message */

struct notify {
	int			 fd;
	struct sockaddr_un	 sun;
	socklen_t		 sunlen;
	int			 ready_due;	/* READY=1 not taken yet */
	uint64_t		 dropped;	/* messages the socket refused */
};

/* NULL when there is no $NOTIFY_SOCKET (or it cannot be used: logged). */
struct notify *
notify_new(void)
{
	const char *path = getenv("NOTIFY_SOCKET");
	struct notify *n;
	size_t len;

	if (path == NULL || *path == '\0')
		return NULL;
	len = strlen(path);
	if ((path[0] != '/' && path[0] != '@') ||
	    len >= sizeof n->sun.sun_path) {
		log_warnx("NOTIFY_SOCKET=%s: not a socket path; no systemd "
		    "notifications", path);
		return NULL;
	}
	n = xcalloc(1, sizeof *n);
	n->sun.sun_family = AF_UNIX;
	memcpy(n->sun.sun_path, path, len);
	if (path[0] == '@')	/* Linux abstract namespace */
		n->sun.sun_path[0] = '\0';
	n->sunlen = (socklen_t)(offsetof(struct sockaddr_un, sun_path) + len);
	n->fd = socket(AF_UNIX, SOCK_DGRAM | SOCK_NONBLOCK | SOCK_CLOEXEC, 0);
	if (n->fd == -1) {
		log_warn("NOTIFY_SOCKET: socket");
		free(n);
		return NULL;
	}
	return n;
}

void
notify_free(struct notify *n)
{
	if (n == NULL)
		return;
	close(n->fd);
	free(n);
}

static int
notify_raw(struct notify *n, const char *msg, size_t len)
{
	ssize_t rc;

	do
		rc = sendto(n->fd, msg, len, MSG_DONTWAIT | MSG_NOSIGNAL,
		    (struct sockaddr *)&n->sun, n->sunlen);
	while (rc == -1 && errno == EINTR);
	if (rc == (ssize_t)len)
		return 0;
	/* The first loss, then every 100th: a reader that never reads
	 * must not fill the log either. */
	if (n->dropped++ % 100 == 0)
		log_warnx("systemd notification not sent (%s): %.*s "
		    "dropped=%" PRIu64, rc == -1 ? strerror(errno) :
		    "short send", (int)strcspn(msg, "\n"), msg, n->dropped);
	return -1;
}

/* Send one message ("READY=1", "STATUS=..."); never waits. */
void
notify_send(struct notify *n, const char *fmt, ...)
{
	char msg[NOTIFY_MAX];
	va_list ap;
	int len;

	if (n == NULL)
		return;
	va_start(ap, fmt);
	len = vsnprintf(msg, sizeof msg, fmt, ap);
	va_end(ap);
	if (len < 0)
		return;
	if ((size_t)len >= sizeof msg)
		len = sizeof msg - 1;
	if (strncmp(msg, "READY=1", 7) == 0)
		n->ready_due = notify_raw(n, msg, (size_t)len) != 0;
	else
		notify_raw(n, msg, (size_t)len);
}

/* From the status timer: READY=1 again if the socket refused it. */
void
notify_retry(struct notify *n)
{
	if (n != NULL && n->ready_due)
		n->ready_due = notify_raw(n, "READY=1", 7) != 0;
}
