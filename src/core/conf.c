/*
 * conf.c: the configuration file. One table, conf_options, names every
 * key with its section, type, field, range, default and help line; the
 * parser, the defaults (conf_new), the deep copy, conf_free and
 * conf_help all walk that table, so a key exists in exactly one place.
 *
 * libinih splits "key = value" lines. We feed it through our own reader
 * (ini_parse_stream) so that we always know the line being handled (the
 * Debian build lacks INI_HANDLER_LINENO), and so that section headers,
 * syntax errors, control bytes and over-long lines are judged here with
 * a message each instead of inih's single "first bad line". Every error
 * is collected as "name:line: message"; any error discards the whole
 * configuration. conf_load is the one function that touches a file.
 */
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include <ini.h>

#include "stopcock/conf.h"
#include "stopcock/log.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"

#define CONF_FILE_MAX (1024 * 1024)	/* bytes in a configuration file */
#define CONF_LINE_MAX 4096		/* bytes in one line */
#define CONF_ERRORS_MAX 100		/* errors reported before giving up */
#define CONF_UNIX_PATH_MAX 107		/* sun_path holds 108 with the NUL */
#define CONF_STRING_MAX 1024
#define CONF_IDENT_MAX 48		/* RFC 5424 APP-NAME */

_Static_assert(sizeof(enum conf_test) == sizeof(int), "enum stored as int");
_Static_assert(sizeof(enum conf_harm) == sizeof(int), "enum stored as int");
_Static_assert(sizeof(enum conf_action) == sizeof(int), "enum stored as int");

enum conf_section {
	S_NONE = -1,
	S_DEFAULTS,
	S_GUARDRAIL,
	S_EXPERIMENT,
	S_DAEMON,
	S_REDIS,
	S_ALERTS,
	S_PAUSE,
	S_SYSLOG,
	S_WEBHOOK,
	S_COUNT
};

static const struct {
	const char	*name;
	int		 named;		/* [kind NAME], any number of them */
} conf_sections[S_COUNT] = {
	[S_DEFAULTS] = { "defaults", 0 },
	[S_GUARDRAIL] = { "guardrail", 1 },
	[S_EXPERIMENT] = { "experiment", 1 },
	[S_DAEMON] = { "daemon", 0 },
	[S_REDIS] = { "redis", 0 },
	[S_ALERTS] = { "alerts", 0 },
	[S_PAUSE] = { "pause", 0 },
	[S_SYSLOG] = { "syslog", 0 },
	[S_WEBHOOK] = { "webhook", 1 },
};

enum conf_type {
	T_DOUBLE,	/* double in [min, max] */
	T_DURATION,	/* double seconds, "250ms", "5s", "2m", "1h" */
	T_U32,		/* uint32_t in [min, max] */
	T_INT,		/* int in [min, max] */
	T_BOOL,		/* int: yes/no */
	T_ENUM,		/* int: index into extra (a NULL-ended word list) */
	T_NAME,		/* char[CONF_NAME_MAX + 1], proto_name_ok */
	T_STRING,	/* char *: printable, at most max bytes */
	T_WORD,		/* char *: printable, no blanks, at most max bytes */
	T_TEMPLATE,	/* T_WORD whose %x escapes are the letters in extra */
	T_FACILITY,	/* char *: a syslog facility name */
	T_HOSTPORT,	/* char *: host:port or [v6]:port */
	T_PATH,		/* char *: absolute path, at most max bytes */
	T_ADDRESS,	/* char *: host:port or an absolute path */
	T_URL,		/* char *: http:// or https:// */
	T_SECRET,	/* char *: whsec_ + base64 */
	T_TOKEN,	/* char *: no blanks, min..max bytes */
	T_MARGIN,	/* guardrail margin: number or percentage */
	T_PLAN		/* experiment arms: "control=50 treatment=50" */
};

#define F_OPEN_MIN	0x01	/* min itself is outside the range */
#define F_OPEN_MAX	0x02
#define F_ZERO_OK	0x04	/* 0 means "unset" even outside the range */
#define F_REQUIRED	0x08

struct conf_option {
	enum conf_section section;
	const char	*key;
	enum conf_type	 type;
	size_t		 offset;
	double		 min, max;
	int		 flags;
	const char	*def;		/* parsed like a value; NULL: unset */
	const void	*extra;
	const char	*help;
};

/* Indexed by enum conf_test, conf_harm, conf_action. */
static const char *const conf_tests[] = {
	"mean", "proportion", "rate", "quantile", NULL
};
static const char *const conf_harms[] = { "increase", "decrease", NULL };
static const char *const conf_actions[] = { "alert", "pause", NULL };

#define C(f) offsetof(struct conf, f)
#define G(f) offsetof(struct conf_guardrail, f)
#define E(f) offsetof(struct conf_experiment, f)
#define W(f) offsetof(struct conf_webhook, f)

static const struct conf_option conf_options[] = {
	{ S_DEFAULTS, "alpha", T_DOUBLE, C(alpha), 0, 0.5, F_OPEN_MIN,
	  "0.05", NULL, "false-alarm budget per experiment, shared by its "
	  "guardrail tests" },
	{ S_DEFAULTS, "srm_alpha", T_DOUBLE, C(srm_alpha), 0, 0.5, F_OPEN_MIN,
	  "0.001", NULL, "false-alarm budget of the sample ratio mismatch "
	  "check" },
	{ S_DEFAULTS, "plan_units", T_DOUBLE, C(plan_units), 1, 1e12, 0,
	  "10000", NULL, "planned units per arm; tunes every test's mixture" },
	{ S_DEFAULTS, "rate_concentration", T_DOUBLE, C(rate_concentration),
	  0, 1e12, F_OPEN_MIN | F_ZERO_OK, "0", NULL,
	  "mixture concentration of rate tests; 0 derives it from "
	  "plan_units" },
	{ S_DEFAULTS, "sketch_accuracy", T_DOUBLE, C(sketch_accuracy),
	  0.0001, 0.5, 0, "0.01", NULL,
	  "relative accuracy of the quantile sketches" },
	{ S_DEFAULTS, "sketch_buckets", T_U32, C(sketch_buckets), 16, 4096, 0,
	  "512", NULL, "bucket cap per quantile sketch (bounds memory)" },
	{ S_DEFAULTS, "history_points", T_U32, C(history_points), 8, 2000, 0,
	  "120", NULL, "chart points kept per test" },
	{ S_DEFAULTS, "max_experiments", T_U32, C(max_experiments), 1, 1e6, 0,
	  "10000", NULL, "experiments tracked at once; records beyond are "
	  "refused and counted" },
	{ S_DEFAULTS, "max_variants", T_U32, C(max_variants), 2,
	  PROTO_PLAN_MAX, 0, "8", NULL, "arms in one experiment's plan" },
	{ S_DEFAULTS, "max_metrics", T_U32, C(max_metrics), 1, 1024, 0,
	  "16", NULL, "metrics tracked per experiment" },

	{ S_DAEMON, "tcp", T_HOSTPORT, C(tcp), 0, 0, 0, NULL, NULL,
	  "listen for records over TCP; unset: no TCP listener" },
	{ S_DAEMON, "udp", T_HOSTPORT, C(udp), 0, 0, 0, NULL, NULL,
	  "listen for records as UDP datagrams; unset: none" },
	{ S_DAEMON, "unix", T_PATH, C(unix_path), 0, CONF_UNIX_PATH_MAX, 0,
	  NULL, NULL, "listen for records on a unix stream socket" },
	{ S_DAEMON, "http", T_HOSTPORT, C(http), 0, 0, 0, NULL, NULL,
	  "HTTP API, status pages and metrics; unset: none" },
	{ S_DAEMON, "state", T_STRING, C(state_dir), 0, CONF_STRING_MAX, 0,
	  "/var/lib/stopcock", NULL, "directory for checkpoints" },
	{ S_DAEMON, "tick", T_DURATION, C(tick), 0.01, 3600, 0, "1s", NULL,
	  "how often tests are re-evaluated" },
	{ S_DAEMON, "checkpoint_every", T_DURATION, C(checkpoint_every),
	  0.01, 86400, 0, "5s", NULL, "how often state is written to disk" },
	{ S_DAEMON, "max_clients", T_U32, C(max_clients), 1, 100000, 0,
	  "256", NULL, "connections accepted at once" },
	{ S_DAEMON, "client_buffer", T_U32, C(client_buffer), 4096,
	  1 << 30, 0, "1048576", NULL, "bytes buffered per client before "
	  "reading pauses" },
	{ S_DAEMON, "http_token", T_TOKEN, C(http_token), 16, 1024, 0, NULL,
	  NULL, "bearer token for POST requests; unset: POST is refused" },
	{ S_DAEMON, "public_url", T_URL, C(public_url), 0, 0, 0,
	  "http://127.0.0.1:7721", NULL, "base of the links in alerts" },

	{ S_REDIS, "address", T_ADDRESS, C(redis_address), 0, 0, 0, NULL,
	  NULL, "Redis server (host:port or socket path); unset: no Redis "
	  "input" },
	{ S_REDIS, "stream", T_WORD, C(redis_stream), 0, CONF_STRING_MAX, 0,
	  "stopcock:events", NULL, "stream the records arrive on" },
	{ S_REDIS, "group", T_WORD, C(redis_group), 0, CONF_STRING_MAX, 0,
	  "stopcock", NULL, "consumer group" },
	{ S_REDIS, "consumer", T_TEMPLATE, C(redis_consumer), 0,
	  CONF_STRING_MAX, 0, "%h", "h", "consumer name; %h is the host "
	  "name" },
	{ S_REDIS, "dead_letter", T_WORD, C(redis_dead_letter), 0,
	  CONF_STRING_MAX, 0, "stopcock:dead", NULL,
	  "stream for entries that failed max_deliveries times" },
	{ S_REDIS, "max_deliveries", T_U32, C(redis_max_deliveries), 1, 1000,
	  0, "5", NULL, "deliveries before an entry is dead-lettered" },
	{ S_REDIS, "claim_idle", T_DURATION, C(redis_claim_idle), 1, 86400,
	  0, "60s", NULL, "claim pending entries idle this long" },
	{ S_REDIS, "batch", T_U32, C(redis_batch), 1, 100000, 0, "256", NULL,
	  "entries per read" },
	{ S_REDIS, "block", T_DURATION, C(redis_block), 0.01, 300, 0, "2s",
	  NULL, "how long one read waits for entries" },

	{ S_GUARDRAIL, "metric", T_NAME, G(metric), 0, 0, F_REQUIRED, NULL,
	  NULL, "metric the guardrail watches" },
	{ S_GUARDRAIL, "test", T_ENUM, G(test), 0, 0, F_REQUIRED, NULL,
	  conf_tests, "quantile and mean read observe records; proportion "
	  "and rate read count records" },
	{ S_GUARDRAIL, "quantile", T_DOUBLE, G(quantile), 0, 1,
	  F_OPEN_MIN | F_OPEN_MAX, NULL, NULL,
	  "which quantile; required for test = quantile, refused otherwise" },
	{ S_GUARDRAIL, "harm", T_ENUM, G(harm), 0, 0, 0, "increase", conf_harms,
	  "which direction of change is harm" },
	{ S_GUARDRAIL, "margin", T_MARGIN, G(margin), 0, 1e12, 0, "0", NULL,
	  "change tolerated before it counts as harm: absolute, or "
	  "relative with a % suffix" },
	{ S_GUARDRAIL, "action", T_ENUM, G(action), 0, 0, 0, "alert",
	  conf_actions,
	  "what harm triggers" },
	{ S_GUARDRAIL, "plan_units", T_DOUBLE, G(plan_units), 1, 1e12,
	  F_ZERO_OK, "0", NULL, "planned units per arm for this guardrail; "
	  "0: the experiment's" },

	{ S_EXPERIMENT, "plan", T_PLAN, E(arms), 0, 0, 0, NULL, NULL,
	  "arms and weights, control first, as in a plan record" },
	{ S_EXPERIMENT, "alpha", T_DOUBLE, E(alpha), 0, 0.5,
	  F_OPEN_MIN | F_ZERO_OK, "0", NULL, "0: [defaults] alpha" },
	{ S_EXPERIMENT, "srm_alpha", T_DOUBLE, E(srm_alpha), 0, 0.5,
	  F_OPEN_MIN | F_ZERO_OK, "0", NULL, "0: [defaults] srm_alpha" },
	{ S_EXPERIMENT, "plan_units", T_DOUBLE, E(plan_units), 1, 1e12,
	  F_ZERO_OK, "0", NULL, "0: [defaults] plan_units" },

	{ S_ALERTS, "remind", T_DURATION, C(remind_every), 0.1, 30 * 86400.0,
	  F_ZERO_OK, "0", NULL, "repeat an unacknowledged harm alert this "
	  "often; 0: never" },

	{ S_PAUSE, "url", T_URL, C(pause_url), 0, 0, 0, NULL, NULL,
	  "POST a signed pause request here" },
	{ S_PAUSE, "secret", T_SECRET, C(pause_secret), 0, 0, 0, NULL, NULL,
	  "signing secret of pause requests" },
	{ S_PAUSE, "redis_key", T_TEMPLATE, C(pause_redis_key), 0,
	  CONF_STRING_MAX, 0, "stopcock:paused:%e", "e",
	  "Redis key set on pause; %e is the experiment" },
	{ S_PAUSE, "redis_channel", T_WORD, C(pause_redis_channel), 0,
	  CONF_STRING_MAX, 0, "stopcock:pauses", NULL,
	  "Redis channel a pause is published on" },
	{ S_PAUSE, "pause_alpha", T_DOUBLE, C(pause_alpha), 0, 0.5,
	  F_OPEN_MIN | F_OPEN_MAX | F_ZERO_OK, "0", NULL,
	  "evidence needed to pause; below every experiment's alpha; 0: a "
	  "tenth of it" },
	{ S_PAUSE, "dry_run", T_BOOL, C(pause_dry_run), 0, 0, 0, "no", NULL,
	  "log and alert the pause but do not send it" },
	{ S_PAUSE, "allow_srm", T_BOOL, C(pause_on_srm), 0, 0, 0, "no", NULL,
	  "also pause on a sample ratio mismatch" },
	{ S_PAUSE, "max_per_hour", T_U32, C(pause_max_per_hour), 0, 100000,
	  0, "6", NULL, "pauses sent per hour at most, across experiments" },

	{ S_WEBHOOK, "url", T_URL, W(url), 0, 0, F_REQUIRED, NULL, NULL,
	  "receiver of the signed alert POSTs" },
	{ S_WEBHOOK, "secret", T_SECRET, W(secret), 0, 0, 0, NULL, NULL,
	  "Standard Webhooks signing secret; unset: unsigned" },
	{ S_WEBHOOK, "timeout", T_DURATION, W(timeout), 0.1, 300, 0, "5s",
	  NULL, "time allowed per request" },
	{ S_WEBHOOK, "max_attempts", T_INT, W(max_attempts), 1, 100, 0, "8",
	  NULL, "attempts per alert, with backoff, before it is dropped" },
	{ S_WEBHOOK, "queue", T_U32, W(queue), 1, 1000000, 0, "1000", NULL,
	  "alerts waiting at most; the oldest is dropped beyond" },

	{ S_SYSLOG, "ident", T_WORD, C(syslog_ident), 0, CONF_IDENT_MAX, 0,
	  "stopcockd", NULL, "program name in syslog lines" },
	{ S_SYSLOG, "facility", T_FACILITY, C(syslog_facility), 0, 0, 0,
	  "daemon", NULL, "daemon, user or local0..local7" },
};

#undef C
#undef E
#undef W

#define CONF_NOPTIONS SC_NELEM(conf_options)

struct conf_parser {
	const char	*name;
	const char	*pos;		/* next line of the text */
	int		 line;		/* line handed to inih last */
	int		 eof;
	struct conf	*conf;

	int		 in_section;	/* a header has been seen */
	enum conf_section sect;		/* S_NONE: skip keys (bad header) */
	int		 sect_line;
	void		*base;		/* struct the section's keys fill */
	char		 label[CONF_NAME_MAX + 32];	/* "[guardrail x]" */
	int		 first[S_COUNT];	/* line of a plain section */
	int		 keyline[CONF_NOPTIONS];	/* 0: key not given */
	char		*longval;	/* value of a line too long for inih */

	char		*errors;
	size_t		 errlen;
	int		 nerrors;
};

static int conf_is_string(enum conf_type);

static void SC_PRINTF(3, 4)
conf_error(struct conf_parser *p, int line, const char *fmt, ...)
{
	va_list ap;
	char *msg, *full;
	int n;

	if (p->nerrors++ > CONF_ERRORS_MAX)
		return;
	if (p->nerrors > CONF_ERRORS_MAX)
		msg = xstrdup("too many errors; giving up");
	else {
		va_start(ap, fmt);
		if (vasprintf(&msg, fmt, ap) < 0)
			fatal("out of memory formatting a string");
		va_end(ap);
	}
	if (line > 0)
		n = xasprintf(&full, "%s:%d: %s\n", p->name, line, msg);
	else
		n = xasprintf(&full, "%s: %s\n", p->name, msg);
	p->errors = xreallocarray(p->errors, 1, p->errlen + n + 1);
	memcpy(p->errors + p->errlen, full, n + 1);
	p->errlen += n;
	free(full);
	free(msg);
}

static int
conf_blank(int c)
{
	return c == ' ' || c == '\t';
}

/* Printable ASCII or any byte of a UTF-8 sequence; blanks if allowed. */
static int
conf_printable(const char *s, int blanks)
{
	const unsigned char *u = (const unsigned char *)s;

	for (; *u != '\0'; u++) {
		if (*u < 0x20 || *u == 0x7f)
			return 0;
		if (!blanks && *u == ' ')
			return 0;
	}
	return 1;
}

static int
conf_in_range(const struct conf_option *o, double v)
{
	if (v == 0 && (o->flags & F_ZERO_OK))
		return 1;
	if ((o->flags & F_OPEN_MIN) ? v <= o->min : v < o->min)
		return 0;
	if ((o->flags & F_OPEN_MAX) ? v >= o->max : v > o->max)
		return 0;
	return 1;
}

static void
conf_duration_text(double s, char *buf, size_t size)
{
	if (s >= 3600 && fmod(s, 3600) == 0)
		snprintf(buf, size, "%gh", s / 3600);
	else if (s >= 60 && fmod(s, 60) == 0)
		snprintf(buf, size, "%gm", s / 60);
	else if (s >= 1)
		snprintf(buf, size, "%gs", s);
	else
		snprintf(buf, size, "%gms", s * 1000);
}

/* The accepted values in words: used by errors and by conf_help. */
static void
conf_range_text(const struct conf_option *o, char *buf, size_t size)
{
	char lo[32], hi[32], words[128];
	const char *const *c;
	size_t len;

	switch (o->type) {
	case T_DOUBLE:
	case T_DURATION:
	case T_U32:
	case T_INT:
		if (o->type == T_DURATION) {
			conf_duration_text(o->min, lo, sizeof lo);
			conf_duration_text(o->max, hi, sizeof hi);
		} else {
			snprintf(lo, sizeof lo, "%.10g", o->min);
			snprintf(hi, sizeof hi, "%.10g", o->max);
		}
		snprintf(buf, size, "%s%s%s, %s%s",
		    (o->flags & F_ZERO_OK) ? "0 or " : "",
		    (o->flags & F_OPEN_MIN) ? "(" : "[", lo, hi,
		    (o->flags & F_OPEN_MAX) ? ")" : "]");
		break;
	case T_ENUM:
		words[0] = '\0';
		for (c = o->extra; *c != NULL; c++) {
			len = strlen(words);
			snprintf(words + len, sizeof words - len, "%s%s",
			    c == o->extra ? "" : "|", *c);
		}
		snprintf(buf, size, "%s", words);
		break;
	case T_BOOL:
		snprintf(buf, size, "yes|no");
		break;
	case T_NAME:
		snprintf(buf, size, "1-%d of A-Z a-z 0-9 . _ : -",
		    CONF_NAME_MAX);
		break;
	case T_STRING:
		snprintf(buf, size, "printable text, up to %.0f bytes", o->max);
		break;
	case T_WORD:
		snprintf(buf, size, "printable text without blanks, up to "
		    "%.0f bytes", o->max);
		break;
	case T_TEMPLATE:
		snprintf(buf, size, "text without blanks; %%%s is the only "
		    "escape", (const char *)o->extra);
		break;
	case T_FACILITY:
		snprintf(buf, size, "daemon, user or local0..local7");
		break;
	case T_HOSTPORT:
		snprintf(buf, size, "host:port or [v6]:port, port 1-65535");
		break;
	case T_PATH:
		snprintf(buf, size, "an absolute path, up to %.0f bytes",
		    o->max);
		break;
	case T_ADDRESS:
		snprintf(buf, size, "host:port, [v6]:port or an absolute "
		    "socket path");
		break;
	case T_URL:
		snprintf(buf, size, "an http:// or https:// URL");
		break;
	case T_SECRET:
		snprintf(buf, size, "whsec_ followed by base64");
		break;
	case T_TOKEN:
		snprintf(buf, size, "%.0f-%.0f bytes without blanks", o->min,
		    o->max);
		break;
	case T_MARGIN:
		snprintf(buf, size, ">= 0, or a percentage like 5%%");
		break;
	case T_PLAN:
		snprintf(buf, size, "2-%d arms NAME=WEIGHT", PROTO_PLAN_MAX);
		break;
	}
}

static int
conf_hostport_ok(const char *s)
{
	const char *colon, *close, *h;
	uint64_t port;

	if (*s == '[') {
		if ((close = strchr(s, ']')) == NULL || close == s + 1)
			return 0;
		for (h = s + 1; h < close; h++) {
			if (strchr("0123456789abcdefABCDEF:.%", *h) == NULL)
				return 0;
		}
		colon = close + 1;
		if (*colon != ':')
			return 0;
	} else {
		if ((colon = strchr(s, ':')) == NULL || colon == s)
			return 0;
		for (h = s; h < colon; h++) {
			if (*h == ' ' || *h == '/' || *h == '[' || *h == ']')
				return 0;
		}
	}
	if (parse_u64(colon + 1, 65535, &port) != 0 || port == 0)
		return 0;
	return 1;
}

static int
conf_url_ok(const char *s)
{
	size_t skip;

	if (strncmp(s, "http://", 7) == 0)
		skip = 7;
	else if (strncmp(s, "https://", 8) == 0)
		skip = 8;
	else
		return 0;
	s += skip;
	if (*s == '\0' || *s == '/' || *s == '?' || *s == '#' || *s == ':')
		return 0;
	return conf_printable(s, 0);
}

static int
conf_b64_char(int c)
{
	return (c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') ||
	    (c >= '0' && c <= '9') || c == '+' || c == '/';
}

/* Padded standard base64 (RFC 4648 section 4), at least one byte. */
static int
conf_base64_ok(const char *s)
{
	size_t n = strlen(s), i, pad = 0;

	if (n == 0 || n % 4 != 0)
		return 0;
	for (i = 0; i < n; i++) {
		if (s[i] == '=') {
			if (i + 2 < n)
				return 0;
			pad++;
		} else if (pad > 0 || !conf_b64_char((unsigned char)s[i]))
			return 0;
	}
	return 1;
}

static int
conf_template_ok(const char *s, const char *letters)
{
	for (; *s != '\0'; s++) {
		if (*s != '%')
			continue;
		if (s[1] == '\0' || strchr(letters, s[1]) == NULL)
			return 0;
		s++;
	}
	return 1;
}

/* "control=50 treatment=50", parsed as the protocol's plan record is. */
static int
conf_set_plan(struct conf_experiment *e, const char *v, char **why)
{
	struct record r;
	enum proto_status st;
	char *line;
	int len, i;

	len = xasprintf(&line, "plan %s %s", e->id, v);
	st = proto_parse(line, (size_t)len, &r);
	free(line);
	if (st != PROTO_OK || r.kind != PROTO_PLAN) {
		xasprintf(why, "%s", st == PROTO_OK ? "not a plan" :
		    proto_describe(st));
		return -1;
	}
	if (r.narms < 2) {
		xasprintf(why, "a plan needs at least 2 arms, control first");
		return -1;
	}
	for (i = 0; i < r.narms; i++) {
		if (!(r.arms[i].weight > 0)) {
			xasprintf(why, "arm %s has weight %g; weights must be "
			    "> 0", r.arms[i].name, r.arms[i].weight);
			return -1;
		}
	}
	e->narms = r.narms;
	memcpy(e->arms, r.arms, sizeof r.arms);
	return 0;
}

static int
conf_set_margin(struct conf_guardrail *g, const struct conf_option *o,
    const char *v, char **why)
{
	size_t len = strlen(v);
	char buf[64];
	double m;

	if (len > 1 && len < sizeof buf && v[len - 1] == '%') {
		memcpy(buf, v, len - 1);
		buf[len - 1] = '\0';
		if (parse_double(buf, 0, 1e4, &m) == 0) {
			g->margin = m / 100;
			g->margin_relative = 1;
			return 0;
		}
	} else if (parse_double(v, o->min, o->max, &m) == 0) {
		g->margin = m;
		g->margin_relative = 0;
		return 0;
	}
	xasprintf(why, "expected a number >= 0, or a percentage like 5%% "
	    "(at most 10000%%)");
	return -1;
}

/*
 * Parse value v for option o into the struct at base. On failure returns
 * -1 with *why saying what was expected (the caller names key and line).
 */
static int
conf_set(const struct conf_option *o, void *base, const char *v, char **why)
{
	char *field = (char *)base + o->offset, range[128];
	const char *const *c;
	double d;
	int ok;
	uint64_t u;
	int i;

	conf_range_text(o, range, sizeof range);
	switch (o->type) {
	case T_DOUBLE:
		if (parse_double(v, -HUGE_VAL, HUGE_VAL, &d) != 0 ||
		    !conf_in_range(o, d)) {
			xasprintf(why, "expected a number in %s", range);
			return -1;
		}
		*(double *)field = d;
		return 0;
	case T_DURATION:
		if (parse_duration(v, &d) != 0 || !conf_in_range(o, d)) {
			xasprintf(why, "expected a duration such as 250ms, 5s, "
			    "2m or 1h in %s", range);
			return -1;
		}
		*(double *)field = d;
		return 0;
	case T_U32:
	case T_INT:
		if (parse_u64(v, (uint64_t)o->max, &u) != 0 ||
		    !conf_in_range(o, (double)u)) {
			xasprintf(why, "expected a whole number in %s", range);
			return -1;
		}
		if (o->type == T_U32)
			*(uint32_t *)field = (uint32_t)u;
		else
			*(int *)field = (int)u;
		return 0;
	case T_BOOL:
		if (strcasecmp(v, "yes") == 0 || strcasecmp(v, "true") == 0 ||
		    strcasecmp(v, "on") == 0 || strcmp(v, "1") == 0)
			*(int *)field = 1;
		else if (strcasecmp(v, "no") == 0 ||
		    strcasecmp(v, "false") == 0 ||
		    strcasecmp(v, "off") == 0 || strcmp(v, "0") == 0)
			*(int *)field = 0;
		else {
			xasprintf(why, "expected yes, no, true, false, on, "
			    "off, 1 or 0");
			return -1;
		}
		return 0;
	case T_ENUM:
		for (c = o->extra, i = 0; *c != NULL; c++, i++) {
			if (strcmp(v, *c) == 0) {
				*(int *)field = i;
				return 0;
			}
		}
		xasprintf(why, "expected one of %s", range);
		return -1;
	case T_NAME:
		if (!proto_name_ok(v, strlen(v))) {
			xasprintf(why, "expected a name of %s", range);
			return -1;
		}
		snprintf(field, CONF_NAME_MAX + 1, "%s", v);
		return 0;
	case T_MARGIN:
		return conf_set_margin(base, o, v, why);
	case T_PLAN:
		return conf_set_plan(base, v, why);
	default:
		break;
	}

	/* Strings: judge, then replace. */
	switch (o->type) {
	case T_STRING:
		ok = conf_printable(v, 1) && strlen(v) <= o->max;
		break;
	case T_WORD:
		ok = conf_printable(v, 0) && strlen(v) <= o->max;
		break;
	case T_TEMPLATE:
		ok = conf_printable(v, 0) && strlen(v) <= o->max &&
		    conf_template_ok(v, o->extra);
		break;
	case T_FACILITY:
		ok = log_facility(v) >= 0;
		break;
	case T_HOSTPORT:
		ok = conf_hostport_ok(v);
		break;
	case T_PATH:
		ok = v[0] == '/' && conf_printable(v, 1) && strlen(v) <= o->max;
		break;
	case T_ADDRESS:
		if (v[0] == '/')
			ok = conf_printable(v, 1) &&
			    strlen(v) <= CONF_UNIX_PATH_MAX;
		else
			ok = conf_hostport_ok(v);
		break;
	case T_URL:
		ok = conf_url_ok(v) && strlen(v) <= CONF_STRING_MAX;
		break;
	case T_SECRET:
		ok = strncmp(v, "whsec_", 6) == 0 && conf_base64_ok(v + 6);
		break;
	case T_TOKEN:
		ok = conf_printable(v, 0) && strlen(v) >= o->min &&
		    strlen(v) <= o->max;
		break;
	default:
		fatal("conf: option %s has no setter", o->key);
	}
	if (!ok) {
		xasprintf(why, "expected %s", range);
		return -1;
	}
	free(*(char **)field);
	*(char **)field = xstrdup(v);
	return 0;
}

static int
conf_is_string(enum conf_type t)
{
	switch (t) {
	case T_STRING:
	case T_WORD:
	case T_TEMPLATE:
	case T_FACILITY:
	case T_HOSTPORT:
	case T_PATH:
	case T_ADDRESS:
	case T_URL:
	case T_SECRET:
	case T_TOKEN:
		return 1;
	default:
		return 0;
	}
}

static void
conf_defaults(enum conf_section s, void *base)
{
	const struct conf_option *o;
	char *why;

	for (o = conf_options; o < conf_options + CONF_NOPTIONS; o++) {
		if (o->section != s || o->def == NULL)
			continue;
		if (conf_set(o, base, o->def, &why) != 0)
			fatal("conf: default of %s: %s", o->key, why);
	}
}

/* Every string field of c, wherever it lives, for dup and free. */
static void
conf_strings(struct conf *c, void (*fn)(char **))
{
	const struct conf_option *o;
	int i;

	for (o = conf_options; o < conf_options + CONF_NOPTIONS; o++) {
		if (!conf_is_string(o->type))
			continue;
		if (o->section == S_WEBHOOK) {
			for (i = 0; i < c->nwebhooks; i++)
				fn((char **)((char *)&c->webhooks[i] +
				    o->offset));
		} else if (!conf_sections[o->section].named)
			fn((char **)((char *)c + o->offset));
		else
			fatal("conf: string option %s in a named section "
			    "without a copy rule", o->key);
	}
	fn(&c->path);
}

static void
conf_free_string(char **s)
{
	free(*s);
	*s = NULL;
}

static void
conf_dup_string(char **s)
{
	if (*s != NULL)
		*s = xstrdup(*s);
}

struct conf *
conf_new(void)
{
	struct conf *c;

	c = xcalloc(1, sizeof *c);
	conf_defaults(S_DEFAULTS, c);
	conf_defaults(S_DAEMON, c);
	conf_defaults(S_REDIS, c);
	conf_defaults(S_ALERTS, c);
	conf_defaults(S_PAUSE, c);
	conf_defaults(S_SYSLOG, c);
	return c;
}

void
conf_free(struct conf *c)
{
	if (c == NULL)
		return;
	conf_strings(c, conf_free_string);
	free(c);
}

struct conf *
conf_dup(const struct conf *src)
{
	struct conf *c;

	c = xmalloc(sizeof *c);
	memcpy(c, src, sizeof *c);
	conf_strings(c, conf_dup_string);
	return c;
}

/* Checks that need the whole section: run at the next header or EOF. */
static void
conf_close_section(struct conf_parser *p)
{
	const struct conf_option *o;
	struct conf_guardrail *g;
	int qline = 0, tline = 0;

	if (p->sect == S_NONE)
		return;
	for (o = conf_options; o < conf_options + CONF_NOPTIONS; o++) {
		if (o->section != p->sect)
			continue;
		if ((o->flags & F_REQUIRED) && p->keyline[o - conf_options] == 0)
			conf_error(p, p->sect_line, "%s is missing required "
			    "key '%s'", p->label, o->key);
		if (o->section == S_GUARDRAIL && o->offset == G(quantile))
			qline = p->keyline[o - conf_options];
		if (o->section == S_GUARDRAIL && o->offset == G(test))
			tline = p->keyline[o - conf_options];
	}
	if (p->sect == S_GUARDRAIL && tline != 0) {
		g = p->base;
		if (g->test == TEST_QUANTILE && qline == 0)
			conf_error(p, p->sect_line, "%s has test = quantile "
			    "but no quantile (such as quantile = 0.99)",
			    p->label);
		else if (g->test != TEST_QUANTILE && qline != 0)
			conf_error(p, qline, "quantile is only for test = "
			    "quantile, not %s, in %s", conf_tests[g->test],
			    p->label);
	}
	p->sect = S_NONE;
}

/* Make room for a [kind NAME] section; NULL (error reported) if refused. */
static void *
conf_open_named(struct conf_parser *p, enum conf_section s,
    const char *name)
{
	struct conf *c = p->conf;
	const char *kind = conf_sections[s].name;
	int i, n, max, first = 0;
	void *base;

	if (!proto_name_ok(name, strlen(name))) {
		conf_error(p, p->line, "bad %s name '%.*s': use 1-%d of "
		    "A-Z a-z 0-9 . _ : -", kind, 80, name, CONF_NAME_MAX);
		return NULL;
	}
	switch (s) {
	case S_GUARDRAIL:
		n = c->nguardrails, max = CONF_GUARDRAILS_MAX;
		for (i = 0; i < n && !first; i++)
			if (strcmp(c->guardrails[i].name, name) == 0)
				first = c->guardrails[i].line;
		break;
	case S_EXPERIMENT:
		n = c->nexperiments, max = CONF_EXPERIMENTS_MAX;
		for (i = 0; i < n && !first; i++)
			if (strcmp(c->experiments[i].id, name) == 0)
				first = c->experiments[i].line;
		break;
	default:
		n = c->nwebhooks, max = CONF_WEBHOOKS_MAX;
		for (i = 0; i < n && !first; i++)
			if (strcmp(c->webhooks[i].name, name) == 0)
				first = c->webhooks[i].line;
		break;
	}
	if (first) {
		conf_error(p, p->line, "duplicate section [%s %s] (first at "
		    "line %d)", kind, name, first);
		return NULL;
	}
	if (n >= max) {
		conf_error(p, p->line, "too many [%s] sections (at most %d)",
		    kind, max);
		return NULL;
	}
	switch (s) {
	case S_GUARDRAIL:
		base = &c->guardrails[c->nguardrails++];
		memset(base, 0, sizeof c->guardrails[0]);
		snprintf(c->guardrails[n].name, CONF_NAME_MAX + 1, "%s", name);
		c->guardrails[n].line = p->line;
		break;
	case S_EXPERIMENT:
		base = &c->experiments[c->nexperiments++];
		memset(base, 0, sizeof c->experiments[0]);
		snprintf(c->experiments[n].id, CONF_NAME_MAX + 1, "%s", name);
		c->experiments[n].line = p->line;
		break;
	default:
		base = &c->webhooks[c->nwebhooks++];
		memset(base, 0, sizeof c->webhooks[0]);
		snprintf(c->webhooks[n].name, CONF_NAME_MAX + 1, "%s", name);
		c->webhooks[n].line = p->line;
		break;
	}
	conf_defaults(s, base);
	return base;
}

/* A "[kind name]" line (s points at '['). */
static void
conf_open_section(struct conf_parser *p, const char *s, size_t len)
{
	char head[CONF_LINE_MAX + 1], *kind, *name, *more, *save;
	const char *close, *after;
	enum conf_section k;
	void *base = NULL;
	int i;

	conf_close_section(p);
	p->in_section = 1;
	p->sect = S_NONE;

	close = memchr(s, ']', len);
	if (close == NULL) {
		conf_error(p, p->line, "section header without ']'");
		return;
	}
	for (after = close + 1; after < s + len; after++) {
		if (*after == ';' || *after == '#')
			break;
		if (!conf_blank(*after)) {
			conf_error(p, p->line, "unexpected text after ']'");
			return;
		}
	}
	memcpy(head, s + 1, close - s - 1);
	head[close - s - 1] = '\0';
	kind = strtok_r(head, " \t", &save);
	name = kind == NULL ? NULL : strtok_r(NULL, " \t", &save);
	more = name == NULL ? NULL : strtok_r(NULL, " \t", &save);
	if (kind == NULL) {
		conf_error(p, p->line, "empty section header []");
		return;
	}
	for (k = 0; k < S_COUNT; k++)
		if (strcmp(conf_sections[k].name, kind) == 0)
			break;
	if (k == S_COUNT) {
		conf_error(p, p->line, "unknown section [%.80s]", kind);
		return;
	}
	if (more != NULL) {
		conf_error(p, p->line, "section header [%s ...] has more "
		    "than one name", kind);
		return;
	}
	if (conf_sections[k].named) {
		if (name == NULL) {
			conf_error(p, p->line, "section [%s] needs a name: "
			    "[%s NAME]", kind, kind);
			return;
		}
		if ((base = conf_open_named(p, k, name)) == NULL)
			return;
		snprintf(p->label, sizeof p->label, "[%s %s]", kind, name);
	} else {
		if (name != NULL) {
			conf_error(p, p->line, "section [%s] takes no name",
			    kind);
			return;
		}
		if (p->first[k]) {
			conf_error(p, p->line, "duplicate section [%s] (first "
			    "at line %d)", kind, p->first[k]);
			return;
		}
		p->first[k] = p->line;
		base = p->conf;
		snprintf(p->label, sizeof p->label, "[%s]", kind);
	}
	for (i = 0; i < (int)CONF_NOPTIONS; i++)
		if (conf_options[i].section == k)
			p->keyline[i] = 0;
	p->sect = k;
	p->sect_line = p->line;
	p->base = base;
}

/* One "key = value" pair, called by inih for the line read last. */
static int
conf_handler(void *user, const char *section, const char *key,
    const char *value)
{
	struct conf_parser *p = user;
	const struct conf_option *o;
	char *why;
	int idx, secret;

	if (p->longval != NULL)
		value = p->longval;
	if (!p->in_section) {
		conf_error(p, p->line, "key '%.80s' is outside any section",
		    key);
		goto out;
	}
	if (p->sect == S_NONE)
		goto out;	/* the header was refused with a message */
	for (o = conf_options; o < conf_options + CONF_NOPTIONS; o++)
		if (o->section == p->sect && strcmp(o->key, key) == 0)
			break;
	if (o == conf_options + CONF_NOPTIONS) {
		conf_error(p, p->line, "unknown key '%.80s' in %s", key,
		    p->label);
		goto out;
	}
	idx = (int)(o - conf_options);
	if (p->keyline[idx] != 0) {
		conf_error(p, p->line, "duplicate key '%s' in %s (first at "
		    "line %d)", key, p->label, p->keyline[idx]);
		goto out;
	}
	p->keyline[idx] = p->line;
	if (*value == '\0') {
		conf_error(p, p->line, "empty value for '%s' in %s (comment "
		    "the line out to leave it unset)", key, p->label);
		goto out;
	}
	if (conf_set(o, p->base, value, &why) != 0) {
		/* Secrets never reach logs, even mistyped ones. */
		secret = o->type == T_SECRET || o->type == T_TOKEN;
		conf_error(p, p->line, "bad value %s%.80s%s for '%s' in %s: %s",
		    secret ? "" : "'", secret ? "(hidden)" : value,
		    secret ? "" : "'", key, p->label, why);
		free(why);
	}
out:
	free(p->longval);
	p->longval = NULL;
	return 1;
}

/*
 * inih's reader: hand over one line at a time, counting lines. Section
 * headers, comments and bad lines are dealt with here and reach inih as
 * empty lines; key lines reach it without leading blanks, which also
 * keeps inih's multi-line continuation from ever applying. A key line
 * too long for inih's buffer goes over as "key=" with the value kept in
 * p->longval.
 */
static char *
conf_reader(char *str, int num, void *stream)
{
	struct conf_parser *p = stream;
	const char *s, *nl, *sep, *v, *end;
	size_t len, klen;

	if (p->eof || *p->pos == '\0' || p->nerrors > CONF_ERRORS_MAX) {
		if (!p->eof)
			conf_close_section(p);
		p->eof = 1;
		return NULL;
	}
	free(p->longval);
	p->longval = NULL;
	s = p->pos;
	nl = strchr(s, '\n');
	len = nl != NULL ? (size_t)(nl - s) : strlen(s);
	p->pos = nl != NULL ? nl + 1 : s + len;
	p->line++;
	str[0] = '\0';

	if (len > 0 && s[len - 1] == '\r')
		len--;
	while (len > 0 && conf_blank(*s))
		s++, len--;
	while (len > 0 && conf_blank(s[len - 1]))
		len--;
	if (len > CONF_LINE_MAX) {
		conf_error(p, p->line, "line is longer than %d bytes",
		    CONF_LINE_MAX);
		return str;
	}
	for (end = s; end < s + len; end++) {
		if ((unsigned char)*end < 0x20 && *end != '\t') {
			conf_error(p, p->line, "control character 0x%02x",
			    (unsigned char)*end);
			return str;
		}
	}
	if (len == 0 || *s == ';' || *s == '#')
		return str;
	if (*s == '[') {
		conf_open_section(p, s, len);
		return str;
	}

	/* A key line: find the separator as inih will. */
	for (sep = s; sep < s + len; sep++) {
		if (*sep == '=' || *sep == ':')
			break;
		if (*sep == ';' && sep > s && conf_blank(sep[-1]))
			sep = s + len;
	}
	if (sep >= s + len) {
		conf_error(p, p->line, "expected 'key = value', '[section]' "
		    "or a comment");
		return str;
	}
	for (klen = sep - s; klen > 0 && conf_blank(s[klen - 1]); klen--)
		;
	if (klen == 0) {
		conf_error(p, p->line, "missing key before '%c'", *sep);
		return str;
	}
	if (len + 3 <= (size_t)num) {
		memcpy(str, s, len);
		str[len] = '\0';
		return str;
	}
	if (klen + 5 > (size_t)num) {
		conf_error(p, p->line, "key is longer than %d bytes", num - 5);
		return str;
	}
	/* Too long for inih: split it ourselves, the same way. */
	for (v = sep + 1; v < s + len && conf_blank(*v); v++)
		;
	for (end = v; end < s + len; end++)
		if (end > v && *end == ';' && conf_blank(end[-1]))
			break;
	while (end > v && conf_blank(end[-1]))
		end--;
	p->longval = xstrndup(v, end - v);
	memcpy(str, s, klen);
	str[klen] = '=';
	str[klen + 1] = '\0';
	return str;
}

static int
conf_observe_test(enum conf_test t)
{
	return t == TEST_MEAN || t == TEST_QUANTILE;
}

/* Rules between sections, once everything is read. */
static void
conf_check(struct conf_parser *p)
{
	struct conf *c = p->conf;
	const struct conf_guardrail *g, *h, *obs, *cnt;
	const struct conf_experiment *e;
	int i, j, pline = 0, clash, distinct = 0;
	const struct conf_option *o;

	for (o = conf_options; o < conf_options + CONF_NOPTIONS; o++)
		if (o->section == S_PAUSE &&
		    o->offset == offsetof(struct conf, pause_alpha))
			pline = p->keyline[o - conf_options];
	if (c->pause_alpha > 0 && c->pause_alpha >= c->alpha)
		conf_error(p, pline, "pause_alpha %g must be below [defaults] "
		    "alpha %g", c->pause_alpha, c->alpha);
	for (i = 0; i < c->nexperiments; i++) {
		e = &c->experiments[i];
		if (c->pause_alpha > 0 && e->alpha > 0 &&
		    c->pause_alpha >= e->alpha)
			conf_error(p, pline, "pause_alpha %g must be below "
			    "alpha %g of experiment %s (line %d)",
			    c->pause_alpha, e->alpha, e->id, e->line);
		if (e->narms > (int)c->max_variants)
			conf_error(p, e->line, "experiment %s plans %d arms, "
			    "more than max_variants (%u)", e->id, e->narms,
			    c->max_variants);
	}
	if (c->nexperiments > (int)c->max_experiments)
		conf_error(p, c->experiments[c->max_experiments].line,
		    "more [experiment] sections than max_experiments (%u)",
		    c->max_experiments);

	/*
	 * A metric arrives either as observe records or as count records;
	 * report the first guardrail that reads it the other way.
	 */
	for (j = 0; j < c->nguardrails; j++) {
		g = &c->guardrails[j];
		clash = 0;
		obs = cnt = NULL;
		for (i = 0; i < j; i++) {
			h = &c->guardrails[i];
			if (strcmp(h->metric, g->metric) != 0)
				continue;
			if (conf_observe_test(h->test))
				obs = obs != NULL ? obs : h;
			else
				cnt = cnt != NULL ? cnt : h;
		}
		if (obs == NULL && cnt == NULL)
			distinct++;
		else if (obs != NULL && cnt != NULL)
			clash = 0;	/* reported at an earlier guardrail */
		else if (obs != NULL && !conf_observe_test(g->test))
			clash = 1, cnt = g;
		else if (cnt != NULL && conf_observe_test(g->test))
			clash = 1, obs = g;
		if (clash)
			conf_error(p, g->line, "metric %s is used by an observe "
			    "test (guardrail %s) and a count test (guardrail "
			    "%s)", g->metric, obs->name, cnt->name);
	}
	if (distinct > (int)c->max_metrics)
		conf_error(p, 0, "guardrails watch %d metrics, more than "
		    "max_metrics (%u)", distinct, c->max_metrics);
}

int
conf_parse(const char *text, const char *name, struct conf **out,
    char **cause)
{
	struct conf_parser *p;
	int rc;

	*out = NULL;
	p = xcalloc(1, sizeof *p);
	p->name = name != NULL ? name : "(config)";
	p->conf = conf_new();
	p->sect = S_NONE;
	p->pos = text;
	if (strncmp(p->pos, "\xef\xbb\xbf", 3) == 0)
		p->pos += 3;	/* a UTF-8 byte order mark */

	rc = ini_parse_stream(conf_reader, p, conf_handler, p);
	if (rc == -2)
		fatal("conf: inih ran out of memory");
	if (rc > 0 && p->nerrors == 0)
		conf_error(p, rc, "syntax error");
	if (p->nerrors == 0)
		conf_check(p);
	free(p->longval);

	if (p->nerrors > 0) {
		p->errors[p->errlen - 1] = '\0';	/* the last newline */
		*cause = p->errors;
		conf_free(p->conf);
		free(p);
		return -1;
	}
	*out = p->conf;
	free(p->errors);
	free(p);
	return 0;
}

int
conf_load(const char *path, struct conf **out, char **cause)
{
	FILE *f;
	char *buf, *nul;
	size_t n;
	int rc, line, err;

	*out = NULL;
	if ((f = fopen(path, "r")) == NULL) {
		xasprintf(cause, "%s: %s", path, strerror(errno));
		return -1;
	}
	buf = xmalloc(CONF_FILE_MAX + 2);
	n = fread(buf, 1, CONF_FILE_MAX + 1, f);
	err = ferror(f) ? errno : 0;
	fclose(f);
	if (err != 0 || n > CONF_FILE_MAX) {
		if (err != 0)
			xasprintf(cause, "%s: %s", path, strerror(err));
		else
			xasprintf(cause, "%s: file is larger than %d bytes",
			    path, CONF_FILE_MAX);
		free(buf);
		return -1;
	}
	buf[n] = '\0';
	if ((nul = memchr(buf, '\0', n)) != NULL) {
		line = 1;
		for (char *q = buf; q < nul; q++)
			line += *q == '\n';
		xasprintf(cause, "%s:%d: NUL byte", path, line);
		free(buf);
		return -1;
	}
	rc = conf_parse(buf, path, out, cause);
	free(buf);
	if (rc == 0)
		(*out)->path = xstrdup(path);
	return rc;
}

static const char *
conf_type_name(enum conf_type t)
{
	static const char *const names[] = {
		[T_DOUBLE] = "number", [T_DURATION] = "duration",
		[T_U32] = "integer", [T_INT] = "integer", [T_BOOL] = "bool",
		[T_ENUM] = "word", [T_NAME] = "name", [T_STRING] = "text",
		[T_WORD] = "word", [T_TEMPLATE] = "template",
		[T_FACILITY] = "word", [T_HOSTPORT] = "host:port",
		[T_PATH] = "path", [T_ADDRESS] = "address", [T_URL] = "url",
		[T_SECRET] = "secret", [T_TOKEN] = "token",
		[T_MARGIN] = "margin", [T_PLAN] = "plan",
	};

	return names[t];
}

void
conf_help(FILE *f)
{
	const struct conf_option *o;
	enum conf_section last = S_NONE;
	char range[128];

	for (o = conf_options; o < conf_options + CONF_NOPTIONS; o++) {
		if (o->section != last) {
			last = o->section;
			fprintf(f, "%s[%s%s]\n", o == conf_options ? "" : "\n",
			    conf_sections[last].name,
			    conf_sections[last].named ? " NAME" : "");
		}
		conf_range_text(o, range, sizeof range);
		fprintf(f, "  %-18s %-9s %-22s %s\n      %s\n", o->key,
		    conf_type_name(o->type),
		    o->def != NULL ? o->def :
		    (o->flags & F_REQUIRED) ? "(required)" : "(unset)",
		    range, o->help);
	}
}

const struct conf_guardrail *
conf_guardrail_for(const struct conf *c, const char *metric, int *from)
{
	int i;

	for (i = *from < 0 ? 0 : *from; i < c->nguardrails; i++) {
		if (strcmp(c->guardrails[i].metric, metric) == 0) {
			*from = i + 1;
			return &c->guardrails[i];
		}
	}
	*from = c->nguardrails;
	return NULL;
}

const struct conf_experiment *
conf_experiment_find(const struct conf *c, const char *id)
{
	int i;

	for (i = 0; i < c->nexperiments; i++)
		if (strcmp(c->experiments[i].id, id) == 0)
			return &c->experiments[i];
	return NULL;
}

const char *
conf_test_name(enum conf_test t)
{
	if ((int)t < 0 || t > TEST_QUANTILE)
		return "unknown";
	return conf_tests[t];
}
