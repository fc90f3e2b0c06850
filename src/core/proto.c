/*
 * proto.c: the event protocol, one record per line. Every source (socket,
 * Redis stream, replay file) hands its lines here and gets back either a
 * struct record or a rejection with a stable reason; the engine never sees
 * text. The plain whitespace form is the fast path (replay aims at millions
 * of lines a second on one core), so it is tokenised in one pass, numbers
 * go through a hand-rolled decimal parser, and nothing is allocated. The
 * JSON form is for producers that already speak JSON; it goes through
 * jansson and is checked key by key so that a typo is an error rather than
 * a silently missing field.
 *
 * JSON form: one object per line, keys
 *   ts          number, optional (unix seconds)
 *   kind        "plan" | "expose" | "observe" | "count"
 *   experiment  name
 *   variant     name                    (expose, observe, count)
 *   metric      name                    (observe, count)
 *   value       number                  (observe)
 *   k           number                  (count)
 *   n           number                  (expose: units, optional; count)
 *   weights     [{"variant": name, "weight": number}, ...]   (plan)
 *   guardrails  [name, ...], the experiment's family  (plan; optional)
 *   unit        string, unit= rules     (expose, observe, count; optional)
 *   epoch       integer, epoch= rules   (expose, observe, count; optional)
 * weights is an array of objects, not an object, so that order survives
 * any JSON tool on the way: the first entry is the control.
 * Unknown keys are bad_json; keys that do not belong to the kind (unit or
 * epoch on a plan too), or a missing required key, are bad_fields. A unit
 * or epoch of the wrong type or value is bad_attribute; a repeated key is
 * bad_json, as every duplicate key is.
 *
 * Attributes of the plain form: after the kind's fixed fields, a run of
 * tokens that each hold '=' (unit=ID, epoch=N, each at most once). A plan
 * may carry guardrails=NAME,NAME... among its arms (so no arm can be
 * called "guardrails"): the guardrails that apply to it. The run
 * is found from the end of the line, so "observe e v m unit=u" lacks its
 * value (bad_fields) rather than having a value "unit=u"; a token without
 * '=' after an attribute is a surplus field (bad_fields), as before.
 */
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <jansson.h>

#include "stopcock/proto.h"
#include "proto_int.h"

#define PROTO_TS_MAX 1e11	/* year 5138: anything later is a unit error */

static const char *const proto_reasons[PROTO_NSTATUS] = {
	[PROTO_OK] = "ok",
	[PROTO_SKIP] = "skip",
	[PROTO_E_LONG] = "too_long",
	[PROTO_E_KIND] = "bad_kind",
	[PROTO_E_FIELDS] = "bad_fields",
	[PROTO_E_NAME] = "bad_name",
	[PROTO_E_NUMBER] = "bad_number",
	[PROTO_E_RANGE] = "out_of_range",
	[PROTO_E_TS] = "bad_timestamp",
	[PROTO_E_PLAN] = "bad_plan",
	[PROTO_E_JSON] = "bad_json",
	[PROTO_E_BYTES] = "bad_bytes",
	[PROTO_E_ATTR] = "bad_attribute",
};

static const char *const proto_sentences[PROTO_NSTATUS] = {
	[PROTO_OK] = "record accepted",
	[PROTO_SKIP] = "blank or comment line",
	[PROTO_E_LONG] = "line is longer than 4096 bytes",
	[PROTO_E_KIND] = "record kind is not one of plan, expose, observe, "
	    "count",
	[PROTO_E_FIELDS] = "wrong number of fields for the record kind",
	[PROTO_E_NAME] = "a name is empty, longer than 64 characters, or has "
	    "a character outside [A-Za-z0-9._:-]",
	[PROTO_E_NUMBER] = "a number is not a finite decimal of at most 400 "
	    "characters (no nan, inf or hex; units must be whole)",
	[PROTO_E_RANGE] = "a number is out of range (K or N negative or above "
	    "1e12, N = 0, units outside 1..1000000000, weight above 1e6)",
	[PROTO_E_TS] = "timestamp is not unix seconds in [0, 1e11)",
	[PROTO_E_PLAN] = "plan needs 2 to 16 variants written NAME=WEIGHT with "
	    "unique names and weights above zero",
	[PROTO_E_JSON] = "not a JSON object with known keys of the right types",
	[PROTO_E_BYTES] = "line holds a NUL or control character",
	[PROTO_E_ATTR] = "an attribute is not unit=ID (1-128 bytes of "
	    "[A-Za-z0-9._:-]), epoch=N (1-1000000000) or, on a plan, "
	    "guardrails=NAME,NAME (distinct names), or is repeated",
};

const char *
proto_reason(enum proto_status st)
{
	if ((unsigned)st >= PROTO_NSTATUS)
		return "unknown";
	return proto_reasons[st];
}

const char *
proto_describe(enum proto_status st)
{
	if ((unsigned)st >= PROTO_NSTATUS)
		return "unknown status";
	return proto_sentences[st];
}

int
proto_name_ok(const char *s, size_t len)
{
	size_t i;

	if (len == 0 || len > PROTO_NAME_MAX)
		return 0;
	for (i = 0; i < len; i++) {
		if (!(proto_class[(unsigned char)s[i]] & PC_NAME))
			return 0;
	}
	return 1;
}

static int
proto_name(char *dst, const char *s, size_t len)
{
	if (!proto_name_ok(s, len))
		return -1;
	memcpy(dst, s, len);
	dst[len] = '\0';
	return 0;
}

/* A whole token as a name: its characters were classed while splitting. */
static inline int
proto_tokname(char *dst, const struct tok *t)
{
	if (!t->name || t->n > PROTO_NAME_MAX)
		return -1;
	memcpy(dst, t->p, t->n);
	dst[t->n] = '\0';
	return 0;
}

/* Whole units: digits only, 1..PROTO_EXPOSE_MAX. */
static enum proto_status
proto_units(const char *s, size_t n, uint64_t *out)
{
	uint64_t u = 0;
	size_t i, start = 0;

	if (n > 0 && (s[0] == '-' || s[0] == '+'))
		start = 1;
	if (n == start || n > 32)
		return PROTO_E_NUMBER;
	for (i = start; i < n; i++) {
		if ((unsigned)(s[i] - '0') >= 10)
			return PROTO_E_NUMBER;
		if (u <= PROTO_EXPOSE_MAX)
			u = u * 10 + (unsigned)(s[i] - '0');
	}
	if (s[0] == '-' || u == 0 || u > PROTO_EXPOSE_MAX)
		return PROTO_E_RANGE;
	*out = u;
	return PROTO_OK;
}

/* unit=: 1..PROTO_UNIT_MAX name characters, copied NUL-terminated. */
static enum proto_status
proto_unit(const char *s, size_t n, struct record *r)
{
	size_t i;

	if (r->unit_len != 0 || n == 0 || n > PROTO_UNIT_MAX)
		return PROTO_E_ATTR;
	for (i = 0; i < n; i++) {
		if (!(proto_class[(unsigned char)s[i]] & PC_NAME))
			return PROTO_E_ATTR;
	}
	memcpy(r->unit, s, n);
	r->unit[n] = '\0';
	r->unit_len = (uint8_t)n;
	return PROTO_OK;
}

/* epoch=: digits only (no sign, point or exponent), 1..PROTO_EPOCH_MAX. */
static enum proto_status
proto_epoch(const char *s, size_t n, struct record *r)
{
	uint64_t u = 0;
	size_t i;

	if (r->epoch != 0 || n == 0)
		return PROTO_E_ATTR;
	for (i = 0; i < n; i++) {
		if ((unsigned)(s[i] - '0') >= 10)
			return PROTO_E_ATTR;
		if (u <= PROTO_EPOCH_MAX)	/* saturate: no overflow */
			u = u * 10 + (unsigned)(s[i] - '0');
	}
	if (u == 0 || u > PROTO_EPOCH_MAX)
		return PROTO_E_ATTR;
	r->epoch = (uint32_t)u;
	return PROTO_OK;
}

/*
 * One name of a plan's family, appended to r->family; PROTO_E_ATTR when
 * it is not a name, is there already, or the list is full.
 */
static enum proto_status
proto_family_add(const char *s, size_t n, struct record *r)
{
	const char *p = r->family, *end = r->family + r->family_len, *c;

	if (n == 0 || n > PROTO_NAME_MAX || !proto_name_ok(s, n) ||
	    (size_t)r->family_len + n + 1 >= sizeof r->family)
		return PROTO_E_ATTR;
	while (p < end) {
		c = memchr(p, ',', (size_t)(end - p));
		if (c == NULL)
			c = end;
		if ((size_t)(c - p) == n && memcmp(p, s, n) == 0)
			return PROTO_E_ATTR;
		p = c + 1;
	}
	if (r->family_len > 0)
		r->family[r->family_len++] = ',';
	memcpy(r->family + r->family_len, s, n);
	r->family_len += (uint16_t)n;
	r->family[r->family_len] = '\0';
	return PROTO_OK;
}

/* guardrails=a,b of a plain plan: once, at least one name. */
static enum proto_status
proto_family(const char *s, size_t n, struct record *r)
{
	const char *c, *end = s + n;
	enum proto_status st;

	if (r->family_len != 0 || n == 0)
		return PROTO_E_ATTR;
	for (;;) {
		c = memchr(s, ',', (size_t)(end - s));
		if ((st = proto_family_add(s, (size_t)((c ? c : end) - s),
		    r)) != PROTO_OK)
			return st;
		if (c == NULL)
			return PROTO_OK;
		s = c + 1;
	}
}

/*
 * The attribute tokens of a plain record. A repeat is caught because a
 * set field is never zero (unit_len >= 1, epoch >= 1) and proto_clear
 * zeroed both.
 */
static enum proto_status
proto_attrs(const struct tok *t, int na, struct record *r)
{
	const char *eq, *v;
	size_t kn, vn;
	enum proto_status st;
	int i;

	for (i = 0; i < na; i++) {
		eq = memchr(t[i].p, '=', t[i].n);
		kn = (size_t)(eq - t[i].p);
		v = eq + 1;
		vn = t[i].n - kn - 1;
		if (kn == 4 && memcmp(t[i].p, "unit", 4) == 0)
			st = proto_unit(v, vn, r);
		else if (kn == 5 && memcmp(t[i].p, "epoch", 5) == 0)
			st = proto_epoch(v, vn, r);
		else
			st = PROTO_E_ATTR;
		if (st != PROTO_OK)
			return st;
	}
	return PROTO_OK;
}

/* A token that may be an attribute: one holding '='. A name token cannot. */
static inline int
proto_isattr(const struct tok *t)
{
	return !t->name && memchr(t->p, '=', t->n) != NULL;
}

static enum proto_status
proto_ts(double ts, struct record *r)
{
	if (!(ts >= 0 && ts < PROTO_TS_MAX))
		return PROTO_E_TS;
	r->has_ts = 1;
	r->ts = ts;
	return PROTO_OK;
}

static enum proto_status
proto_count_values(double k, double n)
{
	if (k < 0 || n <= 0 || k > PROTO_COUNT_MAX || n > PROTO_COUNT_MAX)
		return PROTO_E_RANGE;
	return PROTO_OK;
}

static enum proto_status
proto_weight(double w)
{
	if (w <= 0)
		return PROTO_E_PLAN;
	if (w > PROTO_WEIGHT_MAX)
		return PROTO_E_RANGE;
	return PROTO_OK;
}

static enum proto_status
proto_plan_unique(const struct record *r)
{
	int i, j;

	for (i = 1; i < r->narms; i++) {
		for (j = 0; j < i; j++) {
			if (strcmp(r->arms[i].name, r->arms[j].name) == 0)
				return PROTO_E_PLAN;
		}
	}
	return PROTO_OK;
}

static void
proto_clear(struct record *r)
{
	r->has_ts = 0;
	r->ts = 0;
	r->experiment[0] = r->variant[0] = r->metric[0] = '\0';
	r->value = r->k = r->n = 0;
	r->units = 0;
	r->narms = 0;
	r->epoch = 0;
	r->unit_len = 0;
	r->unit[0] = '\0';
	r->family_len = 0;
	r->family[0] = '\0';
	r->untrusted = 0;
}

static int
proto_is_family(const struct tok *t)
{
	return t->n >= 11 && memcmp(t->p, "guardrails=", 11) == 0;
}

static enum proto_status
proto_plain_plan(const struct tok *t, int nt, struct record *r)
{
	const char *eq;
	struct proto_arm *a;
	enum proto_status st;
	int i, na = 0;

	if (nt < 1)
		return PROTO_E_FIELDS;
	if (proto_tokname(r->experiment, &t[0]) != 0)
		return PROTO_E_NAME;
	for (i = 1; i < nt; i++) {
		if (proto_is_family(&t[i])) {
			/* the family, once; not an arm */
			if ((st = proto_family(t[i].p + 11, t[i].n - 11, r)) !=
			    PROTO_OK)
				return st;
			continue;
		}
		if (++na > PROTO_PLAN_MAX)
			return PROTO_E_PLAN;
		a = &r->arms[na - 1];
		if ((eq = memchr(t[i].p, '=', t[i].n)) == NULL)
			return PROTO_E_PLAN;
		if (proto_name(a->name, t[i].p, eq - t[i].p) != 0)
			return PROTO_E_NAME;
		eq++;
		if (proto_number(eq, t[i].p + t[i].n - eq, 1, &a->weight) != 0)
			return PROTO_E_NUMBER;
		if ((st = proto_weight(a->weight)) != PROTO_OK)
			return st;
	}
	if (na < 2)
		return PROTO_E_PLAN;
	r->narms = na;
	return proto_plan_unique(r);
}

/*
 * The plain form, already split into tokens. Fields are checked in line
 * order, so the reason names the first thing wrong.
 */
static enum proto_status
proto_plain(const struct tok *t, int nt, struct record *r)
{
	enum proto_status st;
	double ts;
	const char *k;
	int na = 0, nf;

	if (t[0].p[0] == '@') {
		if (proto_ts_number(t[0].p + 1, t[0].n - 1, &ts) != 0)
			return PROTO_E_TS;
		if ((st = proto_ts(ts, r)) != PROTO_OK)
			return st;
		t++;
		nt--;
	}
	if (nt == 0)
		return PROTO_E_FIELDS;
	k = t[0].p;
	switch (t[0].n) {
	case 4:
		if (memcmp(k, "plan", 4) == 0) {
			r->kind = PROTO_PLAN;
			return proto_plain_plan(t + 1, nt - 1, r);
		}
		return PROTO_E_KIND;
	case 5:
		if (memcmp(k, "count", 5) != 0)
			return PROTO_E_KIND;
		r->kind = PROTO_COUNT;
		break;
	case 6:
		if (memcmp(k, "expose", 6) != 0)
			return PROTO_E_KIND;
		r->kind = PROTO_EXPOSE;
		break;
	case 7:
		if (memcmp(k, "observe", 7) != 0)
			return PROTO_E_KIND;
		r->kind = PROTO_OBSERVE;
		break;
	default:
		return PROTO_E_KIND;
	}
	/*
	 * Trailing tokens holding '=' are attributes; kind, EXP and VAR never
	 * are. Without attributes this looks at the last token's name flag
	 * only (a number like 123.5 or a name is all name characters).
	 */
	while (nt - na > 3 && proto_isattr(&t[nt - na - 1]))
		na++;
	nf = nt - na;
	switch (r->kind) {
	case PROTO_COUNT:
		if (nf != 6)
			return PROTO_E_FIELDS;
		break;
	case PROTO_EXPOSE:
		if (nf != 3 && nf != 4)
			return PROTO_E_FIELDS;
		break;
	default:
		if (nf != 5)
			return PROTO_E_FIELDS;
		break;
	}
	if (proto_tokname(r->experiment, &t[1]) != 0 ||
	    proto_tokname(r->variant, &t[2]) != 0)
		return PROTO_E_NAME;
	switch (r->kind) {
	case PROTO_EXPOSE:
		r->units = 1;
		if (nf == 4 &&
		    (st = proto_units(t[3].p, t[3].n, &r->units)) != PROTO_OK)
			return st;
		break;
	case PROTO_OBSERVE:
		if (proto_tokname(r->metric, &t[3]) != 0)
			return PROTO_E_NAME;
		if (proto_number(t[4].p, t[4].n, 1, &r->value) != 0)
			return PROTO_E_NUMBER;
		break;
	default:
		if (proto_tokname(r->metric, &t[3]) != 0)
			return PROTO_E_NAME;
		if (proto_number(t[4].p, t[4].n, 1, &r->k) != 0 ||
		    proto_number(t[5].p, t[5].n, 1, &r->n) != 0)
			return PROTO_E_NUMBER;
		if ((st = proto_count_values(r->k, r->n)) != PROTO_OK)
			return st;
		break;
	}
	return na == 0 ? PROTO_OK : proto_attrs(t + nf, na, r);
}

/* Key bits for the JSON form, so a missing or foreign key is one test. */
enum {
	JK_TS = 1 << 0,
	JK_KIND = 1 << 1,
	JK_EXP = 1 << 2,
	JK_VAR = 1 << 3,
	JK_METRIC = 1 << 4,
	JK_VALUE = 1 << 5,
	JK_K = 1 << 6,
	JK_N = 1 << 7,
	JK_WEIGHTS = 1 << 8,
	JK_UNIT = 1 << 9,
	JK_EPOCH = 1 << 10,
	JK_FAMILY = 1 << 11,
	JK_ATTRS = JK_UNIT | JK_EPOCH
};

static const struct {
	const char	*key;
	int		 bit;
} proto_jkeys[] = {
	{ "ts", JK_TS }, { "kind", JK_KIND }, { "experiment", JK_EXP },
	{ "variant", JK_VAR }, { "metric", JK_METRIC }, { "value", JK_VALUE },
	{ "k", JK_K }, { "n", JK_N }, { "weights", JK_WEIGHTS },
	{ "unit", JK_UNIT }, { "epoch", JK_EPOCH },
	{ "guardrails", JK_FAMILY },
};

static enum proto_status
proto_jname(json_t *o, const char *key, char *dst)
{
	json_t *v = json_object_get(o, key);

	if (!json_is_string(v))
		return PROTO_E_JSON;
	if (proto_name(dst, json_string_value(v), json_string_length(v)) != 0)
		return PROTO_E_NAME;
	return PROTO_OK;
}

static enum proto_status
proto_jnumber(json_t *o, const char *key, double *dst)
{
	json_t *v = json_object_get(o, key);

	if (!json_is_number(v))
		return PROTO_E_JSON;
	*dst = json_number_value(v);
	if (!isfinite(*dst))
		return PROTO_E_NUMBER;
	return PROTO_OK;
}

static enum proto_status
proto_jweights(json_t *a, struct record *r)
{
	json_t *e, *name, *w;
	size_t i;
	enum proto_status st;

	if (!json_is_array(a))
		return PROTO_E_JSON;
	for (i = 0; i < json_array_size(a); i++) {
		e = json_array_get(a, i);
		if (!json_is_object(e) || json_object_size(e) != 2)
			return PROTO_E_JSON;
		name = json_object_get(e, "variant");
		w = json_object_get(e, "weight");
		if (!json_is_string(name) || !json_is_number(w))
			return PROTO_E_JSON;
		if (i >= PROTO_PLAN_MAX)
			return PROTO_E_PLAN;
		if (proto_name(r->arms[i].name, json_string_value(name),
		    json_string_length(name)) != 0)
			return PROTO_E_NAME;
		r->arms[i].weight = json_number_value(w);
		if ((st = proto_weight(r->arms[i].weight)) != PROTO_OK)
			return st;
		r->narms = (int)i + 1;
	}
	if (r->narms < 2)
		return PROTO_E_PLAN;
	return proto_plan_unique(r);
}

/*
 * unit and epoch of a JSON record. Integers decode as reals, so an epoch
 * is any number with no fraction: 3 and 3.0 alike, 2.5 not.
 */
static enum proto_status
proto_jattrs(json_t *o, int have, struct record *r)
{
	json_t *v;
	double d;
	enum proto_status st;

	if (have & JK_UNIT) {
		v = json_object_get(o, "unit");
		if (!json_is_string(v))
			return PROTO_E_ATTR;
		if ((st = proto_unit(json_string_value(v), json_string_length(v),
		    r)) != PROTO_OK)
			return st;
	}
	if (have & JK_EPOCH) {
		v = json_object_get(o, "epoch");
		if (!json_is_number(v))
			return PROTO_E_ATTR;
		d = json_number_value(v);
		if (!(d >= 1 && d <= (double)PROTO_EPOCH_MAX) || d != floor(d))
			return PROTO_E_ATTR;
		r->epoch = (uint32_t)d;
	}
	return PROTO_OK;
}

/* "guardrails": a non-empty array of distinct names. */
static enum proto_status
proto_jfamily(json_t *a, struct record *r)
{
	enum proto_status st;
	json_t *v;
	size_t i;

	if (!json_is_array(a) || json_array_size(a) == 0)
		return PROTO_E_ATTR;
	json_array_foreach(a, i, v) {
		if (!json_is_string(v))
			return PROTO_E_ATTR;
		if ((st = proto_family_add(json_string_value(v),
		    json_string_length(v), r)) != PROTO_OK)
			return st;
	}
	return PROTO_OK;
}

static enum proto_status
proto_jrecord(json_t *o, struct record *r)
{
	const char *key, *kind;
	json_t *v;
	int have = 0, need, allow, found;
	size_t i;
	double d;
	enum proto_status st;

	json_object_foreach(o, key, v) {
		found = 0;
		for (i = 0; i < sizeof proto_jkeys / sizeof proto_jkeys[0];
		    i++) {
			if (strcmp(key, proto_jkeys[i].key) == 0) {
				have |= proto_jkeys[i].bit;
				found = 1;
				break;
			}
		}
		if (!found)
			return PROTO_E_JSON;
	}
	if (have & JK_TS) {
		if (!json_is_number(v = json_object_get(o, "ts")))
			return PROTO_E_JSON;
		if ((st = proto_ts(json_number_value(v), r)) != PROTO_OK)
			return st;
	}
	if (!(have & JK_KIND))
		return PROTO_E_FIELDS;
	if (!json_is_string(v = json_object_get(o, "kind")))
		return PROTO_E_JSON;
	kind = json_string_value(v);
	if (strcmp(kind, "plan") == 0) {
		r->kind = PROTO_PLAN;
		need = JK_EXP | JK_WEIGHTS;
		allow = need | JK_FAMILY;
	} else if (strcmp(kind, "expose") == 0) {
		r->kind = PROTO_EXPOSE;
		need = JK_EXP | JK_VAR;
		allow = need | JK_N | JK_ATTRS;
	} else if (strcmp(kind, "observe") == 0) {
		r->kind = PROTO_OBSERVE;
		need = JK_EXP | JK_VAR | JK_METRIC | JK_VALUE;
		allow = need | JK_ATTRS;
	} else if (strcmp(kind, "count") == 0) {
		r->kind = PROTO_COUNT;
		need = JK_EXP | JK_VAR | JK_METRIC | JK_K | JK_N;
		allow = need | JK_ATTRS;
	} else
		return PROTO_E_KIND;
	have &= ~(JK_TS | JK_KIND);
	if ((have & need) != need || (have & ~allow) != 0)
		return PROTO_E_FIELDS;

	if ((st = proto_jname(o, "experiment", r->experiment)) != PROTO_OK)
		return st;
	if (r->kind == PROTO_PLAN) {
		if ((st = proto_jweights(json_object_get(o, "weights"), r)) !=
		    PROTO_OK)
			return st;
		return have & JK_FAMILY ? proto_jfamily(json_object_get(o,
		    "guardrails"), r) : PROTO_OK;
	}
	if ((st = proto_jname(o, "variant", r->variant)) != PROTO_OK)
		return st;
	switch (r->kind) {
	case PROTO_EXPOSE:
		r->units = 1;
		if (!(have & JK_N))
			break;
		if ((st = proto_jnumber(o, "n", &d)) != PROTO_OK)
			return st;
		if (d != floor(d))
			return PROTO_E_NUMBER;
		if (d < 1 || d > (double)PROTO_EXPOSE_MAX)
			return PROTO_E_RANGE;
		r->units = (uint64_t)d;
		break;
	case PROTO_OBSERVE:
		if ((st = proto_jname(o, "metric", r->metric)) != PROTO_OK ||
		    (st = proto_jnumber(o, "value", &r->value)) != PROTO_OK)
			return st;
		break;
	case PROTO_COUNT:
		if ((st = proto_jname(o, "metric", r->metric)) != PROTO_OK ||
		    (st = proto_jnumber(o, "k", &r->k)) != PROTO_OK ||
		    (st = proto_jnumber(o, "n", &r->n)) != PROTO_OK ||
		    (st = proto_count_values(r->k, r->n)) != PROTO_OK)
			return st;
		break;
	default:
		return PROTO_E_KIND;
	}
	return proto_jattrs(o, have, r);
}

/*
 * Integers decode as reals so that "k": 3 and "k": 3.0 are the same thing
 * and a huge integer is a rounded double rather than an error; duplicate
 * keys are refused because which one wins would be a guess.
 */
static enum proto_status
proto_json(const char *line, size_t len, struct record *r)
{
	json_t *o;
	json_error_t err;
	enum proto_status st;

	o = json_loadb(line, len, JSON_REJECT_DUPLICATES |
	    JSON_DECODE_INT_AS_REAL, &err);
	if (o == NULL)
		return PROTO_E_JSON;
	if (!json_is_object(o))
		st = PROTO_E_JSON;
	else
		st = proto_jrecord(o, r);
	json_decref(o);
	return st;
}

enum proto_status
proto_parse(const char *line, size_t len, struct record *r)
{
	struct tok t[PROTO_TOKENS];
	int nt;

	if (len > 0 && line[len - 1] == '\r')
		len--;
	if (len > PROTO_LINE_MAX)
		return PROTO_E_LONG;
	proto_clear(r);

	/* One pass: split on blanks, refuse control bytes anywhere, and note
	 * which tokens are all name characters (proto_scan.c). */
	if ((nt = proto_split(line, len, t)) < 0)
		return PROTO_E_BYTES;
	if (nt == 0 || t[0].p[0] == '#')
		return PROTO_SKIP;
	if (t[0].p[0] == '{')
		return proto_json(t[0].p, line + len - t[0].p, r);
	if (nt > PROTO_TOKENS) {
		/* Only a plan can be this long, and then it has too many arms. */
		if (t[0].p[0] == '@' && nt > 1 && t[1].n == 4 &&
		    memcmp(t[1].p, "plan", 4) == 0)
			return PROTO_E_PLAN;
		if (t[0].n == 4 && memcmp(t[0].p, "plan", 4) == 0)
			return PROTO_E_PLAN;
		nt = PROTO_TOKENS;
	}
	return proto_plain(t, nt, r);
}

/* Shortest %g form that reads back as the same double. */
static int
proto_fmtnum(char *buf, size_t size, double v)
{
	int prec, n = -1;

	for (prec = 15; prec <= 17; prec++) {
		n = snprintf(buf, size, "%.*g", prec, v);
		if (n < 0 || (size_t)n >= size)
			return -1;
		if (strtod(buf, NULL) == v)
			break;
	}
	return n;
}

int
proto_format(const struct record *r, char *buf, size_t size)
{
	char num[3][40];
	size_t off = 0;
	int n, i;

#define PROTO_PUT(...) do {						\
	n = snprintf(buf + off, size - off, __VA_ARGS__);		\
	if (n < 0 || (size_t)n >= size - off)				\
		return -1;						\
	off += (size_t)n;						\
} while (0)

	if (size == 0)
		return -1;
	buf[0] = '\0';
	if (r->has_ts) {
		if (proto_fmtnum(num[0], sizeof num[0], r->ts) < 0)
			return -1;
		PROTO_PUT("@%s ", num[0]);
	}
	switch (r->kind) {
	case PROTO_PLAN:
		if (r->narms < 0 || r->narms > PROTO_PLAN_MAX)
			return -1;
		PROTO_PUT("plan %s", r->experiment);
		for (i = 0; i < r->narms; i++) {
			if (proto_fmtnum(num[0], sizeof num[0],
			    r->arms[i].weight) < 0)
				return -1;
			PROTO_PUT(" %s=%s", r->arms[i].name, num[0]);
		}
		break;
	case PROTO_EXPOSE:
		PROTO_PUT("expose %s %s %" PRIu64, r->experiment, r->variant,
		    r->units);
		break;
	case PROTO_OBSERVE:
		if (proto_fmtnum(num[0], sizeof num[0], r->value) < 0)
			return -1;
		PROTO_PUT("observe %s %s %s %s", r->experiment, r->variant,
		    r->metric, num[0]);
		break;
	case PROTO_COUNT:
		if (proto_fmtnum(num[1], sizeof num[1], r->k) < 0 ||
		    proto_fmtnum(num[2], sizeof num[2], r->n) < 0)
			return -1;
		PROTO_PUT("count %s %s %s %s %s", r->experiment, r->variant,
		    r->metric, num[1], num[2]);
		break;
	default:
		return -1;
	}
	/* never on a plan: "unit=x" there would read back as an arm */
	if (r->kind == PROTO_PLAN) {
		if (r->family_len > 0 && r->family_len < sizeof r->family)
			PROTO_PUT(" guardrails=%.*s", (int)r->family_len,
			    r->family);
		return (int)off;
	}
	if (r->unit_len > PROTO_UNIT_MAX || r->epoch > PROTO_EPOCH_MAX)
		return -1;
	if (r->unit_len > 0)
		PROTO_PUT(" unit=%.*s", (int)r->unit_len, r->unit);
	if (r->epoch > 0)
		PROTO_PUT(" epoch=%" PRIu32, r->epoch);
#undef PROTO_PUT
	return (int)off;
}
