/*
 * redis_in_guard.c: the Redis consumer's crash-loop guard (see
 * "Poison" in redis_in.c). A small file in the state directory says
 * which entries were being applied; a start that finds a batch not
 * done charges one death to each of its entries, and the batch is
 * applied entry by entry the next time, so a second death names the
 * entry that kills us.
 */
#include <fcntl.h>
#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "stopcock/log.h"
#include "redis_in_int.h"

#define REDIS_IN_GUARD_FILE "redis-applying"
#define REDIS_IN_GUARD_SIZE 128	/* "A <first> <last> <failures>", padded */

/*
 * The crash-loop guard's file: "A <first> <last> <failures>" while a
 * batch of entries is being applied, "D" once it is. Two writes per
 * batch, not per entry, keep it cheap for producers of one-record
 * entries. Written without fsync: it guards against the process dying,
 * whose writes the kernel keeps; after a power cut it may say less,
 * which only delays a dead letter.
 */
void
redis_in_guard_open(struct redis_in *r)
{
	char *path, buf[REDIS_IN_GUARD_SIZE + 1], a[SID_BUF], b[SID_BUF];
	unsigned failures;
	ssize_t n;

	xasprintf(&path, "%s/%s", r->d->state_dir, REDIS_IN_GUARD_FILE);
	r->mark_fd = open(path, O_RDWR | O_CREAT | O_CLOEXEC, 0640);
	if (r->mark_fd == -1) {
		log_warn("redis: %s: no crash-loop guard", path);
		free(path);
		return;
	}
	free(path);
	n = pread(r->mark_fd, buf, REDIS_IN_GUARD_SIZE, 0);
	if (n <= 0 || buf[0] != 'A')
		return;
	buf[n] = '\0';
	if (sscanf(buf, "A %47s %47s %u", a, b, &failures) != 3 ||
	    redis_in_sid_parse(a, strlen(a), &r->suspect) != 0 ||
	    redis_in_sid_parse(b, strlen(b), &r->suspect_last) != 0 ||
	    failures >= UINT_MAX - 1)
		return;
	r->suspect_failures = failures + 1;
	log_warnx("redis: the last run died while applying an entry "
	    "entry=%s%s%s failures=%u max_deliveries=%u", a,
	    strcmp(a, b) != 0 ? ".." : "", strcmp(a, b) != 0 ? b : "",
	    r->suspect_failures, (unsigned)r->d->conf->redis_max_deliveries);
}

void
redis_in_guard_write(struct redis_in *r, const char *text)
{
	char buf[REDIS_IN_GUARD_SIZE];
	size_t len = strlen(text);

	if (r->mark_fd == -1)
		return;
	memset(buf, ' ', sizeof buf);
	memcpy(buf, text, len < sizeof buf ? len : sizeof buf);
	buf[sizeof buf - 1] = '\n';
	if (pwrite(r->mark_fd, buf, sizeof buf, 0) != (ssize_t)sizeof buf) {
		log_warn("redis: cannot write %s; no crash-loop guard",
		    REDIS_IN_GUARD_FILE);
		close(r->mark_fd);
		r->mark_fd = -1;
	}
}

void
redis_in_guard_range(struct redis_in *r, struct sid a, struct sid b,
    unsigned failures)
{
	char text[REDIS_IN_GUARD_SIZE], x[SID_BUF], y[SID_BUF];

	snprintf(text, sizeof text, "A %s %s %u", redis_in_sid_fmt(a, x),
	    redis_in_sid_fmt(b, y), failures);
	redis_in_guard_write(r, text);
}

/*
 * Failures to apply id so far: the deaths in the batch (or the entry)
 * the last run died in, charged to each of its entries until a second
 * death, marked entry by entry, names one.
 */
unsigned
redis_in_guard_failures(struct redis_in *r, struct sid id)
{
	if (r->suspect_failures > 0 &&
	    redis_in_sid_cmp(id, r->suspect) >= 0 &&
	    redis_in_sid_cmp(id, r->suspect_last) <= 0)
		return r->suspect_failures;
	return 0;
}

void
redis_in_guard_close(struct redis_in *r)
{
	if (r->mark_fd != -1)
		close(r->mark_fd);
	r->mark_fd = -1;
}
