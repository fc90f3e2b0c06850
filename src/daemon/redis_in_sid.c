/*
 * redis_in_sid.c: stream entry IDs ("<ms>-<seq>", both 64-bit) for the
 * Redis consumer: parsed strictly, formatted, compared and stepped, so
 * redis_in.c, redis_house.c and redis_lease.c order entries alike.
 */
#include <errno.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "redis_in_int.h"

int
redis_in_sid_parse(const char *s, size_t len, struct sid *out)
{
	char buf[SID_BUF], *dash, *end;

	if (len == 0 || len >= sizeof buf)
		return -1;
	memcpy(buf, s, len);
	buf[len] = '\0';
	if (buf[0] < '0' || buf[0] > '9')
		return -1;
	errno = 0;
	out->ms = strtoull(buf, &dash, 10);
	if (errno != 0 || *dash != '-' || dash[1] < '0' || dash[1] > '9')
		return -1;
	out->seq = strtoull(dash + 1, &end, 10);
	if (errno != 0 || *end != '\0')
		return -1;
	return 0;
}

const char *
redis_in_sid_fmt(struct sid id, char *buf)
{
	snprintf(buf, SID_BUF, "%" PRIu64 "-%" PRIu64, id.ms, id.seq);
	return buf;
}

int
redis_in_sid_cmp(struct sid a, struct sid b)
{
	if (a.ms != b.ms)
		return a.ms < b.ms ? -1 : 1;
	if (a.seq != b.seq)
		return a.seq < b.seq ? -1 : 1;
	return 0;
}

/* The smallest ID after id (for inclusive ranges on old servers). */
struct sid
redis_in_sid_next(struct sid id)
{
	if (id.seq == UINT64_MAX) {
		id.ms++;
		id.seq = 0;
	} else
		id.seq++;
	return id;
}

int
redis_in_sid_reply(const redisReply *r, struct sid *out)
{
	if (r == NULL || (r->type != REDIS_REPLY_STRING &&
	    r->type != REDIS_REPLY_STATUS))
		return -1;
	return redis_in_sid_parse(r->str, r->len, out);
}
