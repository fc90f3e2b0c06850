/*
 * conf.c: the configuration file. One table, conf_options in
 * conf_table.c, names every key with its section, type, field, range,
 * default and help line; the parser here, the defaults (conf_new), the
 * deep copy, conf_free and conf_help all walk that table, so a key
 * exists in exactly one place.
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
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <ini.h>

#include "stopcock/conf.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"

#include "conf_int.h"

#define CONF_FILE_MAX (1024 * 1024)	/* bytes in a configuration file */
#define CONF_LINE_MAX 4096		/* bytes in one line */
#define CONF_ERRORS_MAX 100		/* errors reported before giving up */

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
	int		 keyline[CONF_OPTIONS_MAX];	/* 0: key not given */
	char		*longval;	/* value of a line too long for inih */

	char		*errors;
	size_t		 errlen;
	int		 nerrors;
};

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


/* Every string field of c, wherever it lives, for dup and free. */
static void
conf_strings(struct conf *c, void (*fn)(char **))
{
	const struct conf_option *o;
	int i;

	for (o = conf_options; o < conf_options + conf_noptions; o++) {
		if (!conf_table_is_string(o->type))
			continue;
		if (o->section == S_WEBHOOK) {
			for (i = 0; i < c->nwebhooks; i++)
				fn((char **)((char *)&c->webhooks[i] +
				    o->offset));
		} else if (o->section == S_PRODUCER) {
			for (i = 0; i < c->nproducers; i++)
				fn((char **)((char *)&c->producers[i] +
				    o->offset));
		} else if (o->section == S_EXPERIMENT) {
			for (i = 0; i < c->nexperiments; i++)
				fn((char **)((char *)&c->experiments[i] +
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
	conf_table_defaults(S_DEFAULTS, c);
	conf_table_defaults(S_DAEMON, c);
	conf_table_defaults(S_REDIS, c);
	conf_table_defaults(S_KAFKA, c);
	conf_table_defaults(S_ALERTS, c);
	conf_table_defaults(S_PAUSE, c);
	conf_table_defaults(S_SYSLOG, c);
	conf_table_defaults(S_ALERTMANAGER, c);
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
	for (o = conf_options; o < conf_options + conf_noptions; o++) {
		if (o->section != p->sect)
			continue;
		if ((o->flags & F_REQUIRED) && p->keyline[o - conf_options] == 0)
			conf_error(p, p->sect_line, "%s is missing required "
			    "key '%s'", p->label, o->key);
		if (o->section == S_GUARDRAIL && o->offset == offsetof(struct conf_guardrail, quantile))
			qline = p->keyline[o - conf_options];
		if (o->section == S_GUARDRAIL && o->offset == offsetof(struct conf_guardrail, test))
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
	if (p->sect == S_GUARDRAIL) {
		g = p->base;
		if (!(g->vmin < g->vmax))
			conf_error(p, p->sect_line, "%s: min (%g) must be below "
			    "max (%g)", p->label, g->vmin, g->vmax);
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
	case S_PRODUCER:
		n = c->nproducers, max = CONF_PRODUCERS_MAX;
		for (i = 0; i < n && !first; i++)
			if (strcmp(c->producers[i].name, name) == 0)
				first = c->producers[i].line;
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
	case S_PRODUCER:
		base = &c->producers[c->nproducers++];
		memset(base, 0, sizeof c->producers[0]);
		snprintf(c->producers[n].name, CONF_NAME_MAX + 1, "%s", name);
		c->producers[n].line = p->line;
		break;
	default:
		base = &c->webhooks[c->nwebhooks++];
		memset(base, 0, sizeof c->webhooks[0]);
		snprintf(c->webhooks[n].name, CONF_NAME_MAX + 1, "%s", name);
		c->webhooks[n].line = p->line;
		break;
	}
	conf_table_defaults(s, base);
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
	for (i = 0; i < conf_noptions; i++)
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
	for (o = conf_options; o < conf_options + conf_noptions; o++)
		if (o->section == p->sect && strcmp(o->key, key) == 0)
			break;
	if (o == conf_options + conf_noptions) {
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
	if (*value == '\0' && (o->flags & F_EMPTY_OFF)) {
		free(*(char **)((char *)p->base + o->offset));
		*(char **)((char *)p->base + o->offset) = NULL;
		goto out;
	}
	if (*value == '\0') {
		conf_error(p, p->line, "empty value for '%s' in %s (comment "
		    "the line out to leave it unset)", key, p->label);
		goto out;
	}
	if (conf_table_set(o, p->base, value, &why) != 0) {
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

/* An experiment's guardrails: configured ones, each once, at least one
 * (the sections may come in any order, so checked at the end). */
static void
conf_check_family(struct conf_parser *p, const struct conf_experiment *e)
{
	const struct conf *c = p->conf;
	const char *s = e->guardrails, *q, *r;
	size_t len;
	int g, n = 0;

	for (;;) {
		while (*s == ' ' || *s == '\t')
			s++;
		if (*s == '\0')
			break;
		for (q = s; *q != '\0' && *q != ' ' && *q != '\t'; q++)
			;
		len = (size_t)(q - s);
		n++;
		for (g = 0; g < c->nguardrails; g++)
			if (strlen(c->guardrails[g].name) == len &&
			    memcmp(c->guardrails[g].name, s, len) == 0)
				break;
		if (g == c->nguardrails)
			conf_error(p, e->line, "experiment %s: guardrails names "
			    "%.*s, which is not a [guardrail] section", e->id,
			    (int)len, s);
		for (r = e->guardrails; r < s; r++)
			if ((r == e->guardrails || r[-1] == ' ' ||
			    r[-1] == '\t') && strncmp(r, s, len) == 0 &&
			    (r[len] == ' ' || r[len] == '\t'))
				conf_error(p, e->line, "experiment %s: "
				    "guardrails names %.*s twice", e->id,
				    (int)len, s);
		s = q;
	}
	if (n == 0)
		conf_error(p, e->line, "experiment %s: guardrails is empty; "
		    "leave it out for every guardrail", e->id);
}

/* The line of [section] key, 0 when it was not set. */
static int
conf_keyline(struct conf_parser *p, int section, size_t offset)
{
	const struct conf_option *o;

	for (o = conf_options; o < conf_options + conf_noptions; o++)
		if (o->section == section && o->offset == offset)
			return p->keyline[o - conf_options];
	return 0;
}

/*
 * [redis] ha = yes: every daemon reads as one shared consumer (so a new
 * holder finds the old one's pending entries as its own, in ID order),
 * hence no %h in its name; and Redis is the only record input, since a
 * standby replaces its state with the holder's on taking over (records
 * from a socket would be lost with it).
 */
static void
conf_check_redis_ha(struct conf_parser *p)
{
	struct conf *c = p->conf;
	const char *s;
	int line = conf_keyline(p, S_REDIS, offsetof(struct conf, redis_ha));

	if (!c->redis_ha)
		return;
	if (c->redis_address == NULL) {
		conf_error(p, line, "[redis] ha = yes needs [redis] address");
		return;
	}
	for (s = c->redis_consumer; *s != '\0'; s++) {
		if (s[0] == '%' && s[1] == '%') {
			s++;
			continue;
		}
		if (s[0] == '%' && s[1] == 'h') {
			conf_error(p, line, "[redis] ha = yes: every daemon must "
			    "read as the same consumer; set [redis] consumer to "
			    "a name without %%h");
			break;
		}
	}
	if (c->tcp != NULL || c->udp != NULL || c->unix_path != NULL)
		conf_error(p, line, "[redis] ha = yes: Redis must be the "
		    "daemon's only record input (unset [daemon] tcp, udp and "
		    "unix): a standby replaces its state with the lease "
		    "holder's");
	if (c->redis_lease_key != NULL && c->redis_state_key != NULL &&
	    strcmp(c->redis_lease_key, c->redis_state_key) == 0)
		conf_error(p, line, "[redis] lease_key and state_key are both "
		    "%s", c->redis_lease_key);
}

/* Rules between sections, once everything is read. */
static void
conf_check(struct conf_parser *p)
{
	struct conf *c = p->conf;
	const struct conf_guardrail *g, *h, *obs, *cnt;
	const struct conf_experiment *e;
	int i, j, pline = 0, lline = 0, kline = 0, clash;
	const struct conf_option *o;

	for (o = conf_options; o < conf_options + conf_noptions; o++)
		if (o->section == S_PAUSE &&
		    o->offset == offsetof(struct conf, pause_alpha))
			pline = p->keyline[o - conf_options];
	if (c->pause_alpha > 0 && c->pause_alpha >= c->alpha)
		conf_error(p, pline, "pause_alpha %g must be below [defaults] "
		    "alpha %g", c->pause_alpha, c->alpha);
	/* the SRM test keeps one counter row per open interval */
	for (o = conf_options; o < conf_options + conf_noptions; o++)
		if (o->section == S_DEFAULTS &&
		    o->offset == offsetof(struct conf, lateness))
			lline = p->keyline[o - conf_options];
	if (c->srm_interval > 0 && c->lateness / c->srm_interval >
	    CONF_SRM_OPEN_MAX)
		conf_error(p, lline, "lateness %gs spans more than %d intervals "
		    "of srm_interval %gs; raise srm_interval", c->lateness,
		    CONF_SRM_OPEN_MAX, c->srm_interval);
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
		if (e->guardrails != NULL)
			conf_check_family(p, e);
	}
	/*
	 * A Kafka daemon keeps its experiments' state in the state topic,
	 * committed with the input offsets; records from another input
	 * would live only in the local checkpoint, beside state it must
	 * replace on every assignment, so the two are not mixed.
	 */
	for (o = conf_options; o < conf_options + conf_noptions; o++)
		if (o->section == S_KAFKA &&
		    o->offset == offsetof(struct conf, kafka_brokers))
			kline = p->keyline[o - conf_options];
	if (c->kafka_brokers != NULL && (c->tcp != NULL || c->udp != NULL ||
	    c->unix_path != NULL || c->redis_address != NULL))
		conf_error(p, kline, "[kafka] brokers is set: Kafka must be the "
		    "daemon's only record input (unset [daemon] tcp, udp, unix "
		    "and [redis] address)");
	conf_check_redis_ha(p);
	if (c->kafka_brokers != NULL &&
	    strcmp(c->kafka_topic, c->kafka_state_topic) == 0)
		conf_error(p, kline, "[kafka] topic and state_topic are both "
		    "%s; the state needs its own compacted topic",
		    c->kafka_topic);
	for (i = 0; i < c->nproducers; i++)
		if (c->producers[i].secret == NULL &&
		    c->producers[i].previous_secret == NULL &&
		    c->producers[i].secret_file == NULL)
			conf_error(p, c->producers[i].line, "[producer %s] has "
			    "no secret: set secret or secret_file",
			    c->producers[i].name);
	if ((c->tcp_signed || c->udp_signed || c->unix_signed ||
	    c->redis_signed || c->kafka_signed) && c->nproducers == 0)
		conf_error(p, 0, "an input requires signed batches (tcp_signed, "
		    "udp_signed, unix_signed, [redis] signed or [kafka] "
		    "signed) but no [producer NAME] section names a signer");
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
		if (obs != NULL && cnt != NULL)
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
