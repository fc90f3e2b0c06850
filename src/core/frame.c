/*
 * frame.c: signed batches (see frame.h for the format). frame_parse
 * reads a header line strictly: the keyword, five fields separated by
 * one space each, every field checked against its charset and bound
 * before the body is looked at, so a hostile header costs at most
 * FRAME_HEADER_MAX bytes of scanning and a hostile LENGTH is refused
 * before anything waits for the body. frame_check verifies the
 * signature (sign.c), the timestamp and the message id, in that order:
 * only a batch the producer really signed may touch its id set, so a
 * forger cannot flood the set and push real ids out.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/frame.h"
#include "stopcock/names.h"
#include "stopcock/util.h"

struct frame_key {
	unsigned char	 key[SIGN_KEY_MAX];
	size_t		 len;
};

struct frame_seen {
	uint64_t	 h;		/* SipHash of the id */
	long long	 ts;
};

struct frame_producer {
	char		 name[PROTO_NAME_MAX + 1];
	uint8_t		 hashkey[16];
	struct frame_key keys[FRAME_KEYS_MAX];
	int		 nkeys;
	/* a ring of the last cap accepted ids, oldest at next once full,
	 * and an open-addressing index of it (2 * cap slots, each a ring
	 * position + 1, 0 empty) so a check costs one probe, not a scan */
	struct frame_seen *seen;
	uint32_t	*slot;
	uint32_t	 cap, nseen, next;
	long long	 floor;		/* batches at or before it: refused */
};

int
frame_is_header(const char *p, size_t len)
{
	return len >= FRAME_KEYWORD_LEN &&
	    memcmp(p, FRAME_KEYWORD, FRAME_KEYWORD_LEN) == 0;
}

static int
frame_id_ok(const char *s, size_t len)
{
	size_t i;

	if (len == 0 || len > FRAME_ID_MAX)
		return 0;
	for (i = 0; i < len; i++) {
		unsigned char c = (unsigned char)s[i];

		if (!((c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') ||
		    (c >= '0' && c <= '9') || c == '.' || c == '_' ||
		    c == ':' || c == '-'))
			return 0;
	}
	return 1;
}

/* Canonical decimal: digits only, no leading zero but "0" itself. */
static int
frame_decimal(const char *s, size_t len, size_t digits, uint64_t *out)
{
	uint64_t v = 0;
	size_t i;

	if (len == 0 || len > digits || (len > 1 && s[0] == '0'))
		return -1;
	for (i = 0; i < len; i++) {
		if (s[i] < '0' || s[i] > '9')
			return -1;
		v = v * 10 + (uint64_t)(s[i] - '0');
	}
	*out = v;
	return 0;
}

/* "v1," then the 44 base64 characters of a 32-byte MAC. */
static int
frame_sig_ok(const char *s, size_t len)
{
	size_t i;

	if (len != SIGN_SIG_MAX - 1 || memcmp(s, "v1,", 3) != 0)
		return 0;
	for (i = 3; i < len; i++) {
		unsigned char c = (unsigned char)s[i];

		if (!((c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') ||
		    (c >= '0' && c <= '9') || c == '+' || c == '/' ||
		    (c == '=' && i == len - 1)))
			return 0;
	}
	return 1;
}

enum frame_status
frame_fields(const char *producer, size_t plen, const char *id,
    size_t idlen, const char *ts, size_t tslen, const char *sig,
    size_t siglen, size_t body_len, struct frame *f)
{
	uint64_t v;

	if (!proto_name_ok(producer, plen) || !frame_id_ok(id, idlen) ||
	    frame_decimal(ts, tslen, FRAME_TS_DIGITS, &v) != 0 ||
	    !frame_sig_ok(sig, siglen))
		return FRAME_E_MALFORMED;
	memcpy(f->producer, producer, plen);
	f->producer[plen] = '\0';
	memcpy(f->id, id, idlen);
	f->id[idlen] = '\0';
	f->id_len = idlen;
	f->ts = (long long)v;
	memcpy(f->sig, sig, siglen);
	f->sig[siglen] = '\0';
	f->sig_len = siglen;
	f->body_len = body_len;
	return body_len > FRAME_BODY_MAX ? FRAME_E_LONG : FRAME_OK;
}

enum frame_status
frame_parse(const char *p, size_t len, struct frame *f)
{
	const char *nl, *field[5], *end;
	size_t flen[5], n, scan;
	uint64_t body;
	enum frame_status st;
	int i;

	memset(f, 0, sizeof *f);
	scan = len < FRAME_HEADER_MAX ? len : FRAME_HEADER_MAX;
	if ((nl = memchr(p, '\n', scan)) == NULL)
		return len < FRAME_HEADER_MAX ? FRAME_PARTIAL :
		    FRAME_E_MALFORMED;
	f->header_len = (size_t)(nl - p) + 1;
	end = nl;
	if (end > p && end[-1] == '\r')
		end--;
	if (!frame_is_header(p, (size_t)(end - p)))
		return FRAME_E_MALFORMED;
	p += FRAME_KEYWORD_LEN;
	for (i = 0; i < 5; i++) {
		const char *sp = memchr(p, ' ', (size_t)(end - p));

		n = sp != NULL ? (size_t)(sp - p) : (size_t)(end - p);
		if ((sp == NULL) != (i == 4) || n == 0)
			return FRAME_E_MALFORMED;
		field[i] = p;
		flen[i] = n;
		p += n + (sp != NULL);
	}
	if (frame_decimal(field[3], flen[3], 10, &body) != 0)
		return FRAME_E_MALFORMED;
	st = frame_fields(field[0], flen[0], field[1], flen[1], field[2],
	    flen[2], field[4], flen[4], (size_t)body, f);
	if (st != FRAME_OK)
		return st;
	if (len - f->header_len < f->body_len)
		return FRAME_PARTIAL;
	return FRAME_OK;
}

/* ---- producers ---- */

struct frame_producer *
frame_producer_new(const char *name, const uint8_t hashkey[16])
{
	struct frame_producer *fp;

	fp = xcalloc(1, sizeof *fp);
	snprintf(fp->name, sizeof fp->name, "%s", name);
	memcpy(fp->hashkey, hashkey, sizeof fp->hashkey);
	fp->cap = FRAME_REPLAY_IDS_MIN;
	fp->seen = xcalloc(fp->cap, sizeof *fp->seen);
	fp->slot = xcalloc(2 * (size_t)fp->cap, sizeof *fp->slot);
	fp->floor = -1;
	return fp;
}

void
frame_producer_free(struct frame_producer *fp)
{
	if (fp == NULL)
		return;
	free(fp->seen);
	free(fp->slot);
	/* key bytes are secrets: do not leave them in freed memory */
	memset(fp->keys, 0, sizeof fp->keys);
	free(fp);
}

const char *
frame_producer_name(const struct frame_producer *fp)
{
	return fp->name;
}

int
frame_producer_nkeys(const struct frame_producer *fp)
{
	return fp->nkeys;
}

void
frame_producer_take_keys(struct frame_producer *dst,
    const struct frame_producer *src)
{
	memcpy(dst->keys, src->keys, sizeof dst->keys);
	dst->nkeys = src->nkeys;
}

int
frame_producer_add_key(struct frame_producer *fp, const char *secret,
    char **cause)
{
	struct frame_key *k;

	if (fp->nkeys >= FRAME_KEYS_MAX) {
		xasprintf(cause, "producer %s: more than %d secrets", fp->name,
		    FRAME_KEYS_MAX);
		return -1;
	}
	k = &fp->keys[fp->nkeys];
	if (sign_secret_key(secret, k->key, &k->len, cause) != 0)
		return -1;
	fp->nkeys++;
	return 0;
}

long long
frame_producer_floor(const struct frame_producer *fp)
{
	long long f = fp->floor;
	uint32_t i;

	for (i = 0; i < fp->nseen; i++)
		if (fp->seen[i].ts > f)
			f = fp->seen[i].ts;
	return f;
}

void
frame_producer_set_floor(struct frame_producer *fp, long long floor)
{
	if (floor > fp->floor)
		fp->floor = floor;
}

/* ---- the window of recent ids ---- */

static uint32_t
frame_seen_home(const struct frame_producer *fp, uint64_t h)
{
	return (uint32_t)(h & (2 * (uint64_t)fp->cap - 1));
}

static int
frame_seen_has(const struct frame_producer *fp, uint64_t h)
{
	uint32_t mask = 2 * fp->cap - 1, i;

	for (i = frame_seen_home(fp, h); fp->slot[i] != 0; i = (i + 1) & mask)
		if (fp->seen[fp->slot[i] - 1].h == h)
			return 1;
	return 0;
}

static void
frame_seen_index(struct frame_producer *fp, uint32_t pos)
{
	uint32_t mask = 2 * fp->cap - 1, i;

	for (i = frame_seen_home(fp, fp->seen[pos].h); fp->slot[i] != 0;
	    i = (i + 1) & mask)
		;
	fp->slot[i] = pos + 1;
}

/* Unindex ring position pos, shifting later probes back into the gap
 * (linear probing's deletion without tombstones). */
static void
frame_seen_unindex(struct frame_producer *fp, uint32_t pos)
{
	uint32_t mask = 2 * fp->cap - 1, i, k, home;

	for (i = frame_seen_home(fp, fp->seen[pos].h); fp->slot[i] != pos + 1;
	    i = (i + 1) & mask)
		;
	fp->slot[i] = 0;
	for (k = (i + 1) & mask; fp->slot[k] != 0; k = (k + 1) & mask) {
		home = frame_seen_home(fp, fp->seen[fp->slot[k] - 1].h);
		/* an entry stays when its home lies cyclically in (i, k] */
		if (i <= k ? (home > i && home <= k) : (home > i || home <= k))
			continue;
		fp->slot[i] = fp->slot[k];
		fp->slot[k] = 0;
		i = k;
	}
}

/* A full window doubles, oldest first, so none is forgotten yet. */
static void
frame_seen_grow(struct frame_producer *fp)
{
	struct frame_seen *ring;
	uint32_t i, old = fp->cap;

	ring = xcalloc(2 * (size_t)old, sizeof *ring);
	for (i = 0; i < old; i++)
		ring[i] = fp->seen[(fp->next + i) % old];
	free(fp->seen);
	free(fp->slot);
	fp->seen = ring;
	fp->cap = 2 * old;
	fp->slot = xcalloc(2 * (size_t)fp->cap, sizeof *fp->slot);
	fp->next = 0;
	for (i = 0; i < fp->nseen; i++)
		frame_seen_index(fp, i);
}

enum frame_verdict
frame_check(struct frame_producer *fp, const struct frame *f,
    const char *body, double now, double tolerance)
{
	uint64_t h;
	uint32_t pos;
	int k, ok = 0;

	/* every key is tried, so the time taken does not say which one
	 * (or whether any) matched */
	for (k = 0; k < fp->nkeys; k++)
		ok |= sign_check(fp->keys[k].key, fp->keys[k].len, f->id,
		    f->id_len, f->ts, body, f->body_len, f->sig, f->sig_len);
	if (!ok)
		return FRAME_BAD_SIGNATURE;
	if (!(fabs(now - (double)f->ts) <= tolerance))
		return FRAME_STALE;
	if (f->ts <= fp->floor)
		return FRAME_REPLAYED;
	h = siphash24(fp->hashkey, f->id, f->id_len);
	if (frame_seen_has(fp, h))
		return FRAME_REPLAYED;
	if (fp->nseen == fp->cap && fp->cap < FRAME_REPLAY_IDS)
		frame_seen_grow(fp);
	if (fp->nseen < fp->cap)
		pos = fp->nseen++;
	else {
		/* forgetting an id: nothing at or before its stamp passes */
		pos = fp->next;
		if (fp->seen[pos].ts > fp->floor)
			fp->floor = fp->seen[pos].ts;
		frame_seen_unindex(fp, pos);
		fp->next = (fp->next + 1) % fp->cap;
	}
	fp->seen[pos] = (struct frame_seen){ h, f->ts };
	frame_seen_index(fp, pos);
	return FRAME_ACCEPT;
}

const char *
frame_verdict_reason(enum frame_verdict v)
{
	switch (v) {
	case FRAME_ACCEPT:
		return "accepted";
	case FRAME_BAD_SIGNATURE:
		return "bad_signature";
	case FRAME_STALE:
		return "stale_timestamp";
	case FRAME_REPLAYED:
		return "replayed";
	}
	return "bad_signature";
}
