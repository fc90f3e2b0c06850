/*
 * ingest.c: the one door into the engine for records. Every input (TCP,
 * UDP, Unix socket, Redis stream, HTTP) hands complete lines here; a line
 * is parsed by proto_parse, stamped with the loop's cached wall time when
 * it carries no timestamp, and applied with the next event number.
 *
 * A line knows its origin: in a producer's verified batch (auth.c) or
 * not, and, when not, whether its input is trusted; the record carries
 * that trust to the engine and the applied record is counted by source.
 *
 * Bad lines never stop anything: each one is counted per source and
 * reason, and the first few per source and minute are logged with the
 * reason and a short, escaped sample; the rest are summed up once the
 * minute is over. The counters are exported as Prometheus text and kept
 * in the checkpoint, so they stay consistent with the engine's tallies
 * across restarts.
 */
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/time.h>

#include <event2/buffer.h>
#include <event2/event.h>

#include "stopcock/log.h"
#include "daemon.h"

#define INGEST_LOG_PER_MINUTE 5	/* rejections logged per source */
#define INGEST_SAMPLE 80	/* bytes of a bad line shown in the log */

/* Rate limit of rejection logging, per source. */
struct ingest_log {
	double		window;		/* start of the current minute */
	unsigned	logged;		/* lines logged in this window */
	uint64_t	suppressed;	/* not logged in this window */
};

struct ingest {
	struct ingest_counters	 counters;
	struct ingest_log	 log[SRC_N];
	uint64_t		 seq;		/* engine event numbers */
	struct engine		*into;		/* NULL: d->engine */
};

struct ingest *
ingest_new(void)
{
	return xcalloc(1, sizeof(struct ingest));
}

void
ingest_free(struct ingest *in)
{
	free(in);
}

struct ingest_counters *
ingest_counters(struct daemon *d)
{
	return &d->ingest->counters;
}

static double
ingest_now(struct daemon *d)
{
	struct timeval tv;

	/* The loop caches the time once per iteration: a syscall-free
	 * clock read per line matters at millions of lines a second. */
	if (d->base != NULL &&
	    event_base_gettimeofday_cached(d->base, &tv) == 0)
		return tv.tv_sec + tv.tv_usec / 1e6;
	return daemon_now();
}

/* Printable, bounded rendering of a bad line for the log. */
static void
ingest_escape(const char *s, size_t len, char *out, size_t size)
{
	static const char hex[] = "0123456789abcdef";
	size_t i, o = 0;

	for (i = 0; i < len && o + 5 < size; i++) {
		unsigned char c = (unsigned char)s[i];

		if (c >= 0x20 && c < 0x7f && c != '\\') {
			out[o++] = (char)c;
		} else {
			out[o++] = '\\';
			out[o++] = 'x';
			out[o++] = hex[c >> 4];
			out[o++] = hex[c & 15];
		}
	}
	if (i < len && o + 3 < size) {
		memcpy(out + o, "...", 3);
		o += 3;
	}
	out[o] = '\0';
}

/* Log one rejection if the per-source budget of this minute allows. */
static void
ingest_log_reject(struct daemon *d, enum source src, const char *reason,
    const char *why, const char *line, size_t len, size_t total)
{
	struct ingest_log *lg = &d->ingest->log[src];
	double now = ingest_now(d);
	char sample[INGEST_SAMPLE * 4 + 8];

	if (now - lg->window >= 60) {
		if (lg->suppressed > 0)
			log_warnx("ingest: %" PRIu64 " more rejected lines not "
			    "logged source=%s", lg->suppressed,
			    source_name(src));
		lg->window = now;
		lg->logged = 0;
		lg->suppressed = 0;
	}
	if (lg->logged >= INGEST_LOG_PER_MINUTE) {
		lg->suppressed++;
		return;
	}
	lg->logged++;
	if (line != NULL)
		ingest_escape(line, len < INGEST_SAMPLE ? len : INGEST_SAMPLE,
		    sample, sizeof sample);
	else
		sample[0] = '\0';
	if (line != NULL && len > INGEST_SAMPLE)
		strcat(sample, "...");
	log_warnx("ingest: rejected line: %s source=%s reason=%s bytes=%zu "
	    "line=\"%s\"", why, source_name(src), reason, total, sample);
}

void
ingest_reject(struct daemon *d, enum source src, enum proto_status st,
    size_t len, const char *sample, size_t samplelen)
{
	struct ingest_counters *c = &d->ingest->counters;

	if (st <= PROTO_SKIP || st >= PROTO_NSTATUS)
		st = PROTO_E_BYTES;
	c->lines[src]++;
	c->bytes[src] += len;
	c->proto_rejected[src][st]++;
	ingest_log_reject(d, src, proto_reason(st), proto_describe(st), sample,
	    samplelen, len);
}

/*
 * One line; authed: it came in a verified batch. The record carries its
 * trust to the engine (record.untrusted), which keeps untrusted records
 * away from experiments that may pause.
 */
static enum ingest_status
ingest_one(struct daemon *d, enum source src, int authed, const char *line,
    size_t len)
{
	struct ingest_counters *c = &d->ingest->counters;
	struct record rec;
	enum proto_status st;
	enum engine_reject er;

	c->lines[src]++;
	c->bytes[src] += len;
	st = proto_parse(line, len, &rec);
	if (st == PROTO_SKIP)
		return INGEST_SKIP;
	if (st != PROTO_OK) {
		if (st >= PROTO_NSTATUS)
			st = PROTO_E_BYTES;
		c->proto_rejected[src][st]++;
		ingest_log_reject(d, src, proto_reason(st), proto_describe(st),
		    line, len, len);
		return INGEST_BAD_LINE;
	}
	rec.untrusted = !authed && !auth_trusted(d->conf, src);
	er = engine_apply(d->ingest->into != NULL ? d->ingest->into :
	    d->engine, &rec, rec.has_ts ? rec.ts : ingest_now(d),
	    ++d->ingest->seq);
	if (er != ENGINE_OK) {
		if (er >= ENGINE_NREJECT)
			er = ENGINE_E_UNPLANNED;
		c->engine_rejected[src][er]++;
		ingest_log_reject(d, src, engine_reason(er),
		    "refused by the engine", line, len, len);
		return INGEST_REFUSED;
	}
	c->records[src]++;
	if (!authed)
		c->unsigned_records[src]++;
	return INGEST_OK;
}

enum ingest_status
ingest_line_status(struct daemon *d, enum source src, const char *line,
    size_t len)
{
	return ingest_one(d, src, 0, line, len);
}

/*
 * A block holding one or more lines (a datagram, a Redis entry's records
 * field); a final newline is optional. Over-long lines cost only
 * themselves.
 */
static uint64_t
ingest_block(struct daemon *d, enum source src, int authed, const char *p,
    size_t len)
{
	const char *nl;
	size_t n;
	uint64_t applied = 0;

	while (len > 0) {
		nl = memchr(p, '\n', len);
		n = nl != NULL ? (size_t)(nl - p) : len;
		if (n > PROTO_LINE_MAX)
			ingest_reject(d, src, PROTO_E_LONG, n, p, n);
		else if (ingest_one(d, src, authed, p, n) == INGEST_OK)
			applied++;
		if (nl == NULL)
			break;
		p += n + 1;
		len -= n + 1;
	}
	return applied;
}

void
ingest_lines(struct daemon *d, enum source src, const char *p, size_t len)
{
	(void)ingest_block(d, src, 0, p, len);
}

uint64_t
ingest_lines_signed(struct daemon *d, enum source src, const char *p,
    size_t len)
{
	return ingest_block(d, src, 1, p, len);
}

/* Where lines go from now (a Kafka partition's engine; NULL: the
 * daemon's); returns where they went before. */
struct engine *
ingest_into(struct daemon *d, struct engine *e)
{
	struct engine *was = d->ingest->into;

	d->ingest->into = e;
	return was;
}

void
ingest_lines_into(struct daemon *d, struct engine *e, enum source src,
    const char *p, size_t len)
{
	struct engine *was = ingest_into(d, e);

	ingest_lines(d, src, p, len);
	(void)ingest_into(d, was);
}

int
ingest_line(struct daemon *d, enum source src, const char *line, size_t len)
{
	switch (ingest_line_status(d, src, line, len)) {
	case INGEST_OK:
	case INGEST_SKIP:
		return 0;
	default:
		return -1;
	}
}

uint64_t
ingest_records_total(struct daemon *d)
{
	uint64_t n = 0;
	int s;

	for (s = 0; s < SRC_N; s++)
		n += d->ingest->counters.records[s];
	return n;
}

void
ingest_metrics(struct daemon *d, struct evbuffer *b)
{
	struct ingest_counters *c = &d->ingest->counters;
	int s, r;

	metrics_family(b, "stopcock_lines_total", "counter",
	    "Lines read, blank and comment lines included.");
	for (s = 0; s < SRC_N; s++)
		evbuffer_add_printf(b, "stopcock_lines_total{source=\"%s\"} %"
		    PRIu64 "\n", source_name(s), c->lines[s]);
	metrics_family(b, "stopcock_bytes_total", "counter",
	    "Bytes of line content read, line terminators excluded.");
	for (s = 0; s < SRC_N; s++)
		evbuffer_add_printf(b, "stopcock_bytes_total{source=\"%s\"} %"
		    PRIu64 "\n", source_name(s), c->bytes[s]);
	metrics_family(b, "stopcock_records_total", "counter",
	    "Records applied to the engine.");
	for (s = 0; s < SRC_N; s++)
		evbuffer_add_printf(b, "stopcock_records_total{source=\"%s\"} %"
		    PRIu64 "\n", source_name(s), c->records[s]);
	metrics_family(b, "stopcock_rejected_total", "counter",
	    "Lines refused by the protocol or the engine, by reason.");
	for (s = 0; s < SRC_N; s++) {
		for (r = PROTO_SKIP + 1; r < PROTO_NSTATUS; r++)
			evbuffer_add_printf(b, "stopcock_rejected_total{source="
			    "\"%s\",reason=\"%s\"} %" PRIu64 "\n",
			    source_name(s), proto_reason(r),
			    c->proto_rejected[s][r]);
		for (r = ENGINE_OK + 1; r < ENGINE_NREJECT; r++)
			evbuffer_add_printf(b, "stopcock_rejected_total{source="
			    "\"%s\",reason=\"%s\"} %" PRIu64 "\n",
			    source_name(s), engine_reason(r),
			    c->engine_rejected[s][r]);
	}
}

/*
 * {"records": {"tcp": N, ...}, "lines": {...}, "bytes": {...},
 *  "rejected": {"tcp": {"bad_name": N, ...}, ...}}; zero reasons left out.
 */
json_t *
ingest_json(struct daemon *d)
{
	struct ingest_counters *c = &d->ingest->counters;
	json_t *o = json_object(), *rec = json_object(), *lines = json_object();
	json_t *bytes = json_object(), *rej = json_object(), *rs;
	int s, r;

	for (s = 0; s < SRC_N; s++) {
		json_object_set_new(rec, source_name(s),
		    json_integer((json_int_t)c->records[s]));
		json_object_set_new(lines, source_name(s),
		    json_integer((json_int_t)c->lines[s]));
		json_object_set_new(bytes, source_name(s),
		    json_integer((json_int_t)c->bytes[s]));
		rs = json_object();
		for (r = PROTO_SKIP + 1; r < PROTO_NSTATUS; r++)
			if (c->proto_rejected[s][r] != 0)
				json_object_set_new(rs, proto_reason(r),
				    json_integer((json_int_t)
				    c->proto_rejected[s][r]));
		for (r = ENGINE_OK + 1; r < ENGINE_NREJECT; r++)
			if (c->engine_rejected[s][r] != 0)
				json_object_set_new(rs, engine_reason(r),
				    json_integer((json_int_t)
				    c->engine_rejected[s][r]));
		json_object_set_new(rej, source_name(s), rs);
	}
	json_object_set_new(o, "records", rec);
	json_object_set_new(o, "lines", lines);
	json_object_set_new(o, "bytes", bytes);
	json_object_set_new(o, "rejected", rej);
	return o;
}

static uint64_t
ingest_get(const json_t *o, const char *key)
{
	json_t *v = json_object_get(o, key);

	if (!json_is_integer(v) || json_integer_value(v) < 0)
		return 0;
	return (uint64_t)json_integer_value(v);
}

/* Counters are informative: missing or odd values restore as zero. */
void
ingest_restore(struct daemon *d, const json_t *o)
{
	struct ingest_counters *c = &d->ingest->counters;
	json_t *rec, *lines, *bytes, *rej, *rs;
	int s, r;

	if (!json_is_object(o))
		return;
	rec = json_object_get(o, "records");
	lines = json_object_get(o, "lines");
	bytes = json_object_get(o, "bytes");
	rej = json_object_get(o, "rejected");
	for (s = 0; s < SRC_N; s++) {
		c->records[s] = ingest_get(rec, source_name(s));
		c->lines[s] = ingest_get(lines, source_name(s));
		c->bytes[s] = ingest_get(bytes, source_name(s));
		rs = json_object_get(rej, source_name(s));
		for (r = PROTO_SKIP + 1; r < PROTO_NSTATUS; r++)
			c->proto_rejected[s][r] = ingest_get(rs,
			    proto_reason(r));
		for (r = ENGINE_OK + 1; r < ENGINE_NREJECT; r++)
			c->engine_rejected[s][r] = ingest_get(rs,
			    engine_reason(r));
	}
}
