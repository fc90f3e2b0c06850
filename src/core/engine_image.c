/*
 * engine_image.c: the full state image the daemon checkpoints
 * (engine_save, engine_restore): every tally, sketch, unit group, held
 * record, SRM interval, test state and detector, so a restore continues
 * exactly where the save stopped. The image keeps infinities as the
 * strings "inf"/"-inf" so the running intersections come back as saved.
 * A restore refuses an image it cannot read whole; it never half-loads.
 */
#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <openssl/evp.h>

#include "stopcock/util.h"
#include "engine_int.h"

#define STATE_FORMAT "stopcock-engine"
#define STATE_VERSION 1

static json_t *
sreal(double x)
{
	if (isfinite(x))
		return json_real(x);
	if (isnan(x))
		return json_null();
	return json_string(x > 0 ? "inf" : "-inf");
}

static int
get_real(const json_t *o, const char *k, double *out)
{
	const json_t *v = json_object_get(o, k);
	const char *s;

	if (v == NULL)
		return -1;
	if (json_is_number(v)) {
		*out = json_number_value(v);
		return 0;
	}
	if (json_is_null(v)) {
		*out = NAN;
		return 0;
	}
	if ((s = json_string_value(v)) != NULL) {
		if (strcmp(s, "inf") == 0)
			*out = INFINITY;
		else if (strcmp(s, "-inf") == 0)
			*out = -INFINITY;
		else
			return -1;
		return 0;
	}
	return -1;
}

static double
aget(const json_t *a, size_t i)
{
	const json_t *v = json_array_get(a, i);

	if (json_is_number(v))
		return json_number_value(v);
	if (json_is_string(v))
		return strcmp(json_string_value(v), "-inf") == 0 ? -INFINITY :
		    INFINITY;
	return NAN;
}

static json_t *
hist_save(const struct hist *h)
{
	json_t *a = json_array();
	uint32_t i;

	for (i = 0; i < h->n; i++)
		json_array_append_new(a, json_pack("[o, o, o, o, o]",
		    sreal(h->pt[i].t), sreal(h->pt[i].a), sreal(h->pt[i].b),
		    sreal(h->pt[i].c), sreal(h->pt[i].p)));
	return json_pack("{s:o, s:i, s:i}", "points", a, "stride",
	    (int)h->stride, "skip", (int)h->skip);
}

static void
hist_load(struct hist *h, const json_t *o, uint32_t cap)
{
	const json_t *a = json_object_get(o, "points"), *p;
	size_t i;

	memset(h, 0, sizeof *h);
	json_array_foreach(a, i, p) {
		if (i >= cap)
			break;
		hist_offer(h, cap, aget(p, 0), aget(p, 1), aget(p, 2),
		    aget(p, 3), aget(p, 4));
	}
	h->stride = (uint32_t)json_integer_value(json_object_get(o,
	    "stride"));
	h->skip = (uint32_t)json_integer_value(json_object_get(o, "skip"));
}

static json_t *
arms_save(const struct proto_arm *arms, int narms)
{
	json_t *a = json_array();
	int i;

	for (i = 0; i < narms; i++)
		json_array_append_new(a, json_pack("[s, f]", arms[i].name,
		    arms[i].weight));
	return a;
}

static int
arms_load(const json_t *a, struct proto_arm *arms, int *narms)
{
	const json_t *v;
	size_t i;
	const char *name;

	if (!json_is_array(a) || json_array_size(a) < 2 ||
	    json_array_size(a) > PROTO_PLAN_MAX)
		return -1;
	json_array_foreach(a, i, v) {
		name = json_string_value(json_array_get(v, 0));
		if (name == NULL || !proto_name_ok(name, strlen(name)))
			return -1;
		snprintf(arms[i].name, sizeof arms[i].name, "%s", name);
		arms[i].weight = aget(v, 1);
		if (!(arms[i].weight > 0))
			return -1;
	}
	*narms = (int)json_array_size(a);
	return 0;
}

static json_t *
sketch_save(const struct sketch *sk)
{
	size_t n = sketch_encoded_size(sk), m;
	uint8_t *buf = xmalloc(n);
	char *b64;
	json_t *s;

	m = sketch_encode(sk, buf, n);
	b64 = xmalloc(4 * ((m + 2) / 3) + 1);
	EVP_EncodeBlock((unsigned char *)b64, buf, (int)m);
	s = json_string(b64);
	free(b64);
	free(buf);
	return s;
}

static struct sketch *
sketch_load(const char *b64)
{
	size_t len = strlen(b64), pad = 0;
	uint8_t *buf;
	int n;
	struct sketch *sk;

	if (len % 4 != 0 || len > (1u << 26))
		return NULL;
	buf = xmalloc(len / 4 * 3 + 1);
	if ((n = EVP_DecodeBlock(buf, (const unsigned char *)b64,
	    (int)len)) < 0) {
		free(buf);
		return NULL;
	}
	if (len >= 1 && b64[len - 1] == '=')
		pad++;
	if (len >= 2 && b64[len - 2] == '=')
		pad++;
	sk = sketch_decode_any(buf, (size_t)n - pad);
	free(buf);
	return sk;
}

static json_t *
groups_save(const struct groups *g)
{
	json_t *sa = json_array(), *na = json_array();
	uint32_t i;

	for (i = 0; i < g->G; i++) {
		json_array_append_new(sa, sreal(g->sn[2 * (size_t)i]));
		json_array_append_new(na, sreal(g->sn[2 * (size_t)i + 1]));
	}
	/* the design effect's cache too, so a restored engine looks with
	 * the same variances as the one that saved it */
	return json_pack("{s:I, s:o, s:o, s:[o, o, o]}", "seq",
	    (json_int_t)g->seq, "s", sa, "n", na, "deff", sreal(g->deff_at),
	    sreal(g->deff), sreal(g->gv));
}

/* Held metric records: [t, a, b, h] each, h's bits as a signed integer. */
static json_t *
held_save(const struct heldq *q)
{
	json_t *a = json_array();
	const struct held *r;
	json_int_t h;
	uint32_t i;

	for (i = 0; i < q->n; i++) {
		r = &q->q[(q->head + i) % q->cap];
		memcpy(&h, &r->h, sizeof h);
		json_array_append_new(a, json_pack("[o, o, o, I]", sreal(r->t),
		    sreal(r->a), sreal(r->b), h));
	}
	return a;
}

static int
held_load(struct experiment *e, struct series *s, const json_t *a)
{
	const json_t *v;
	struct held r;
	json_int_t h;
	size_t i;

	json_array_foreach(a, i, v) {
		if (e->held >= ENGINE_HELD_MAX || json_array_size(v) != 4)
			return -1;
		r.t = aget(v, 0);
		r.a = aget(v, 1);
		r.b = aget(v, 2);
		h = json_integer_value(json_array_get(v, 3));
		memcpy(&r.h, &h, sizeof r.h);
		if (!isfinite(r.t) || !isfinite(r.a) || !isfinite(r.b))
			return -1;
		align_push(e, s, &r);
	}
	return 0;
}

/* Groups of a series, at the count they were saved with (a changed
 * unit_groups applies to series that start after it). */
static int
groups_load(struct series *sr, const json_t *o, uint32_t Gmax)
{
	const json_t *sa = json_object_get(o, "s"), *na = json_object_get(o,
	    "n"), *d;
	size_t G = json_array_size(sa);
	uint32_t i;

	(void)Gmax;
	if (G < 2 || G > CONF_UNIT_GROUPS_MAX || json_array_size(na) != G)
		return -1;
	sr->grp = xcalloc(1, sizeof *sr->grp);
	sr->grp->G = (uint32_t)G;
	sr->grp->sn = xcalloc(2 * G, sizeof *sr->grp->sn);
	sr->grp->seq = (uint64_t)json_integer_value(json_object_get(o, "seq"));
	for (i = 0; i < G; i++) {
		sr->grp->sn[2 * i] = aget(sa, i);
		sr->grp->sn[2 * i + 1] = aget(na, i);
		if (!isfinite(sr->grp->sn[2 * i]) ||
		    !isfinite(sr->grp->sn[2 * i + 1]))
			return -1;
		sr->grp->used += sr->grp->sn[2 * i + 1] != 0;
	}
	if ((d = json_object_get(o, "deff")) != NULL) {
		sr->grp->deff_at = aget(d, 0);
		sr->grp->deff = aget(d, 1);
		sr->grp->gv = aget(d, 2);
		if (!(sr->grp->deff_at >= 0) || !isfinite(sr->grp->deff))
			sr->grp->deff_at = sr->grp->deff = sr->grp->gv = 0;
	}
	return 0;
}

/* The SRM test's open intervals: [interval, count per arm...] rows. */
static json_t *
srm_ring_save(const struct experiment *e)
{
	json_t *rows = json_array(), *row;
	const uint64_t *slot;
	int64_t j;
	int i, any;

	if (isnan(e->srm_newest))
		return rows;
	for (j = e->srm_done; j < e->srm_done + (int64_t)e->srm_slots; j++) {
		int64_t k = j % (int64_t)e->srm_slots;
		if (k < 0)
			k += e->srm_slots;
		slot = e->srm_ring + (size_t)k * (size_t)e->narms;
		for (i = any = 0; i < e->narms; i++)
			any |= slot[i] != 0;
		if (!any)
			continue;
		row = json_array();
		json_array_append_new(row, json_integer((json_int_t)j));
		for (i = 0; i < e->narms; i++)
			json_array_append_new(row, json_integer(
			    (json_int_t)slot[i]));
		json_array_append_new(rows, row);
	}
	return rows;
}

static int
srm_ring_load(struct experiment *e, const json_t *rows)
{
	const json_t *row;
	size_t r;
	int64_t j, k;
	int i;

	json_array_foreach(rows, r, row) {
		if (json_array_size(row) != (size_t)e->narms + 1)
			return -1;
		j = (int64_t)json_integer_value(json_array_get(row, 0));
		/* a lateness changed since the image was written: what no
		 * longer fits the ring is late, counted, not applied */
		if (j < e->srm_done || j >= e->srm_done +
		    (int64_t)e->srm_slots) {
			for (i = 0; i < e->narms; i++)
				e->srm_late[i] += (uint64_t)json_integer_value(
				    json_array_get(row, (size_t)i + 1));
			continue;
		}
		k = j % (int64_t)e->srm_slots;
		if (k < 0)
			k += e->srm_slots;
		for (i = 0; i < e->narms; i++)
			e->srm_ring[(size_t)k * (size_t)e->narms + (size_t)i] =
			    (uint64_t)json_integer_value(json_array_get(row,
			    (size_t)i + 1));
	}
	return 0;
}

static json_t *
reals_save(const double *x, size_t n)
{
	json_t *a = json_array();
	size_t i;

	for (i = 0; i < n; i++)
		json_array_append_new(a, sreal(x[i]));
	return a;
}

/* Fill x[0..n) from an array of exactly n numbers (nan, +-inf allowed). */
static int
reals_load(const json_t *a, double *x, size_t n)
{
	size_t i;

	if (!json_is_array(a) || json_array_size(a) != n)
		return -1;
	for (i = 0; i < n; i++)
		x[i] = json_is_null(json_array_get(a, i)) ? NAN : aget(a, i);
	return 0;
}

/* A test's change detector, block snapshot and recent windows. */
static json_t *
change_save(const struct test *t)
{
	json_t *o, *w = json_array();
	int i;

	o = json_pack("{s:b, s:b, s:b, s:o, s:o, s:o, s:o, s:i, s:o}", "on",
	    t->det_on, "alarm", t->det_alarm, "by_detector", t->by_detector,
	    "log_m", sreal(t->det_log_m), "start", sreal(t->det_start),
	    "block_ts", sreal(t->blk_ts), "snap", reals_save(&t->snap[0][0],
	    6), "k", t->det.k, "blocks", sreal(t->det.blocks));
	json_object_set_new(o, "quantile_x0", sreal(t->qd_x0));
	json_object_set_new(o, "quantile_cum", reals_save(&t->qd_cum[0][0],
	    6));
	json_object_set_new(o, "lambda", reals_save(t->det.lambda,
	    STATS_DETECT_GRID));
	json_object_set_new(o, "log_w", reals_save(t->det.log_w,
	    STATS_DETECT_GRID));
	json_object_set_new(o, "log_mk", reals_save(t->det.log_m,
	    STATS_DETECT_GRID));
	json_object_set_new(o, "startk", reals_save(t->det.start,
	    STATS_DETECT_GRID));
	for (i = 0; i < CHANGE_WINDOWS; i++)
		json_array_append_new(w, json_pack("{s:i, s:i, s:o, s:o}",
		    "head", t->win[i].head, "n", t->win[i].n, "ts",
		    reals_save(t->win[i].ts, CHANGE_WIN_SLOTS), "snap",
		    reals_save(&t->win[i].snap[0][0][0], CHANGE_WIN_SLOTS * 6)));
	json_object_set_new(o, "windows", w);
	return o;
}

static int
change_load(struct test *t, const json_t *o)
{
	const json_t *w, *wi;
	size_t i;

	t->det_on = json_is_true(json_object_get(o, "on"));
	t->det_alarm = json_is_true(json_object_get(o, "alarm"));
	t->by_detector = json_is_true(json_object_get(o, "by_detector"));
	t->det.k = (int)json_integer_value(json_object_get(o, "k"));
	if (t->det.k < 0 || t->det.k > STATS_DETECT_GRID ||
	    get_real(o, "log_m", &t->det_log_m) != 0 ||
	    get_real(o, "start", &t->det_start) != 0 ||
	    get_real(o, "block_ts", &t->blk_ts) != 0 ||
	    get_real(o, "blocks", &t->det.blocks) != 0 ||
	    reals_load(json_object_get(o, "snap"), &t->snap[0][0], 6) != 0 ||
	    reals_load(json_object_get(o, "lambda"), t->det.lambda,
	    STATS_DETECT_GRID) != 0 ||
	    reals_load(json_object_get(o, "log_w"), t->det.log_w,
	    STATS_DETECT_GRID) != 0 ||
	    reals_load(json_object_get(o, "log_mk"), t->det.log_m,
	    STATS_DETECT_GRID) != 0 ||
	    reals_load(json_object_get(o, "startk"), t->det.start,
	    STATS_DETECT_GRID) != 0)
		return -1;
	if (t->det_on && stats_detect_check(&t->det) != 0)
		return -1;
	/* images from before quantile detection have none: it restarts */
	if (get_real(o, "quantile_x0", &t->qd_x0) != 0)
		t->qd_x0 = NAN;
	if (json_object_get(o, "quantile_cum") == NULL ||
	    reals_load(json_object_get(o, "quantile_cum"), &t->qd_cum[0][0],
	    6) != 0)
		memset(t->qd_cum, 0, sizeof t->qd_cum);
	w = json_object_get(o, "windows");
	if (json_array_size(w) != CHANGE_WINDOWS)
		return -1;
	json_array_foreach(w, i, wi) {
		struct change_window *cw = &t->win[i];
		cw->head = (int)json_integer_value(json_object_get(wi, "head"));
		cw->n = (int)json_integer_value(json_object_get(wi, "n"));
		if (cw->head < 0 || cw->head >= CHANGE_WIN_SLOTS || cw->n < 0 ||
		    cw->n > CHANGE_WIN_SLOTS ||
		    reals_load(json_object_get(wi, "ts"), cw->ts,
		    CHANGE_WIN_SLOTS) != 0 ||
		    reals_load(json_object_get(wi, "snap"),
		    &cw->snap[0][0][0], CHANGE_WIN_SLOTS * 6) != 0)
			return -1;
	}
	return 0;
}

/*
 * The scalar fields of a test the image keeps: saved and restored from
 * this one table, so a field cannot be saved and forgotten on restore.
 * A field missing from an older image keeps the value test_init gave it
 * (look counters missing or null restart at 0).
 */
enum field_type { FIELD_REAL, FIELD_COUNT, FIELD_BOOL, FIELD_LOOKS,
	FIELD_INT };

static const struct test_field {
	const char	*key;
	size_t		 off;
	enum field_type	 type;
} test_fields[] = {
#define F(name, type) { #name, offsetof(struct test, name), type }
	F(log_e, FIELD_REAL), F(closed_log_e, FIELD_REAL),
	F(max_log_e, FIELD_REAL), F(cs_lo, FIELD_REAL), F(cs_hi, FIELD_REAL),
	F(est, FIELD_REAL), F(lo, FIELD_REAL), F(hi, FIELD_REAL),
	F(rel, FIELD_REAL), F(rel_lo, FIELD_REAL), F(rel_hi, FIELD_REAL),
	F(margin_abs, FIELD_REAL), F(ctl_value, FIELD_REAL),
	F(trt_value, FIELD_REAL), F(ctl_lo, FIELD_REAL), F(ctl_hi, FIELD_REAL),
	F(trt_lo, FIELD_REAL), F(trt_hi, FIELD_REAL), F(first_ts, FIELD_REAL),
	F(first_event, FIELD_COUNT), F(pause_sent, FIELD_BOOL),
	F(dirty, FIELD_BOOL), F(cs_n, FIELD_LOOKS), F(ev_n, FIELD_LOOKS),
	F(late_base, FIELD_REAL), F(est_closing, FIELD_BOOL),
	F(restart_ts, FIELD_REAL), F(restart_why, FIELD_INT),
	F(restart_prev, FIELD_INT),
#undef F
};

static void
fields_save(json_t *to, const struct test *t)
{
	const char *base = (const char *)t;
	const struct test_field *f;
	size_t i;

	for (i = 0; i < sizeof test_fields / sizeof *test_fields; i++) {
		f = &test_fields[i];
		switch (f->type) {
		case FIELD_REAL:
		case FIELD_LOOKS:
			json_object_set_new(to, f->key,
			    sreal(*(const double *)(base + f->off)));
			break;
		case FIELD_COUNT:
			json_object_set_new(to, f->key, json_integer(
			    (json_int_t)*(const uint64_t *)(base + f->off)));
			break;
		case FIELD_BOOL:
			json_object_set_new(to, f->key,
			    json_boolean(*(const int *)(base + f->off)));
			break;
		case FIELD_INT:
			json_object_set_new(to, f->key,
			    json_integer(*(const int *)(base + f->off)));
			break;
		}
	}
}

static void
fields_load(const json_t *v, struct test *t)
{
	char *base = (char *)t;
	const struct test_field *f;
	double *d;
	size_t i;

	for (i = 0; i < sizeof test_fields / sizeof *test_fields; i++) {
		f = &test_fields[i];
		switch (f->type) {
		case FIELD_REAL:
			(void)get_real(v, f->key, (double *)(base + f->off));
			break;
		case FIELD_LOOKS:
			d = (double *)(base + f->off);
			if (get_real(v, f->key, d) != 0 || isnan(*d))
				*d = 0;
			break;
		case FIELD_COUNT:
			*(uint64_t *)(base + f->off) = (uint64_t)
			    json_integer_value(json_object_get(v, f->key));
			break;
		case FIELD_BOOL:
			*(int *)(base + f->off) = json_is_true(
			    json_object_get(v, f->key));
			break;
		case FIELD_INT:
			*(int *)(base + f->off) = (int)json_integer_value(
			    json_object_get(v, f->key));
			break;
		}
	}
}

static json_t *
exp_save(const struct experiment *e, const struct conf *conf)
{
	json_t *o, *a, *m, *arms, *tests;
	int i, j;

	o = json_pack("{s:s, s:i, s:o}", "id", e->id, "epoch", (int)e->epoch,
	    "arms", arms_save(e->arms, e->narms));
	a = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(a, json_integer(
		    (json_int_t)e->exposures[i]));
	json_object_set_new(o, "exposures", a);
	a = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(a, sreal(e->srm_a[i]));
	json_object_set_new(o, "srm", json_pack(
	    "{s:o, s:o, s:o, s:b, s:o, s:I, s:o}", "a", a, "log_e",
	    sreal(e->srm_log_e), "max_log_e", sreal(e->srm_max_log_e),
	    "fired", e->srm_fired, "first_ts", sreal(e->srm_first_ts),
	    "first_event", (json_int_t)e->srm_first_event, "hist",
	    hist_save(&e->srm_hist)));
	a = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(a, json_integer(
		    (json_int_t)e->srm_late[i]));
	json_object_set_new(json_object_get(o, "srm"), "late", a);
	a = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(a, json_integer(
		    (json_int_t)e->srm_ahead[i]));
	json_object_set_new(json_object_get(o, "srm"), "ahead", a);
	json_object_set_new(json_object_get(o, "srm"), "top", reals_save(
	    e->srm_top, (size_t)e->srm_ntop));
	json_object_set_new(json_object_get(o, "srm"), "floor",
	    sreal(e->srm_floor));
	json_object_set_new(json_object_get(o, "srm"), "stamped",
	    json_boolean(e->srm_stamped));
	if (!isnan(e->srm_newest)) {
		json_object_set_new(json_object_get(o, "srm"), "done",
		    json_integer((json_int_t)e->srm_done));
		json_object_set_new(json_object_get(o, "srm"), "newest",
		    sreal(e->srm_newest));
		json_object_set_new(json_object_get(o, "srm"), "open",
		    srm_ring_save(e));
	}
	json_object_set_new(o, "late_epoch", json_integer(
	    (json_int_t)e->late_epoch));
	json_object_set_new(o, "untrusted_records", json_integer(
	    (json_int_t)e->untrusted_records));
	{
		char hex[33];
		for (i = 0; i < 16; i++)
			snprintf(hex + 2 * i, 3, "%02x", e->unit_key[i]);
		json_object_set_new(o, "unit_key", json_string(hex));
	}
	a = json_array();
	for (i = 0; i < e->nepochs; i++)
		json_array_append_new(a, json_pack("{s:i, s:o, s:o}", "epoch",
		    (int)e->epochs[i].epoch, "started",
		    sreal(e->epochs[i].started), "arms",
		    arms_save(e->epochs[i].arms, e->epochs[i].narms)));
	json_object_set_new(o, "epochs", a);
	a = json_array();
	for (i = 0; i < e->nmetrics; i++) {
		const struct metric *mt = &e->metrics[i];
		arms = json_array();
		for (j = 0; mt->arm && j < e->narms; j++) {
			const struct series *s = &mt->arm[j];
			m = json_pack("{s:[I, o, o], s:[I, o, o, o, o, o]}",
			    "m", (json_int_t)s->m.n, sreal(s->m.mean),
			    sreal(s->m.m2), "r", (json_int_t)s->r.records,
			    sreal((double)s->r.k), sreal((double)s->r.n),
			    sreal((double)s->r.kk), sreal((double)s->r.kn),
			    sreal((double)s->r.nn));
			if (s->sk)
				json_object_set_new(m, "sketch",
				    sketch_save(s->sk));
			if (s->grp)
				json_object_set_new(m, "groups",
				    groups_save(s->grp));
			json_object_set_new(m, "latest", sreal(s->hq.latest));
			if (s->hq.n > 0)
				json_object_set_new(m, "held",
				    held_save(&s->hq));
			json_array_append_new(arms, m);
		}
		json_array_append_new(a, json_pack("{s:s, s:i, s:o, s:o, s:o, "
		    "s:b}", "name", mt->name, "kind", (int)mt->kind, "series",
		    arms, "wm", sreal(mt->wm), "arrived", sreal(mt->arrived),
		    "stamped", mt->stamped));
	}
	json_object_set_new(o, "metrics", a);
	tests = json_array();
	for (i = 0; i < e->ntests; i++) {
		const struct test *t = &e->tests[i];
		const struct conf_guardrail *g = &conf->guardrails[t->g];
		json_t *to = json_pack("{s:s, s:s, s:s, s:s, s:i}",
		    "guardrail", g->name, "metric", g->metric, "test",
		    conf_test_name(g->test), "variant", t->variant, "verdict",
		    (int)t->verdict);
		fields_save(to, t);
		json_object_set_new(to, "change", change_save(t));
		for (j = 0; j < 2; j++)
			if (t->qg[j] != NULL)
				json_object_set_new(to, j ? "qg_treatment" :
				    "qg_control", json_pack("{s:o, s:o}", "x0",
				    sreal(t->qx0[j]), "groups",
				    groups_save(t->qg[j])));
		json_object_set_new(to, "hist", hist_save(&t->hist));
		json_array_append_new(tests, to);
	}
	json_object_set_new(o, "tests", tests);
	if (e->fam_fixed) {
		/* by name: the indices change with the configuration */
		a = json_array();
		for (j = 0; j < conf->nguardrails; j++)
			if (e->fam_mask >> j & 1)
				json_array_append_new(a, json_string(
				    conf->guardrails[j].name));
		json_object_set_new(o, "family", json_pack("{s:o, s:i}",
		    "guardrails", a, "n", e->fam_n));
	}
	json_object_set_new(o, "last_ts", sreal(e->last_ts));
	json_object_set_new(o, "last_event",
	    json_integer((json_int_t)e->last_event));
	if (e->closing != NULL) {
		json_t *c = exp_save(e->closing, conf);
		json_object_set_new(c, "until",
		    sreal(e->closing->closing_until));
		json_object_set_new(c, "records", json_integer(
		    (json_int_t)e->closing->closing_records));
		json_object_set_new(o, "closing", c);
	}
	return o;
}

json_t *
engine_save(const struct engine *eng)
{
	json_t *a = json_array(), *c;
	uint32_t i;
	int k;

	for (i = 0; i < eng->nexps; i++)
		json_array_append_new(a, exp_save(eng->exps[i], eng->conf));
	c = json_object();
	json_object_set_new(c, "applied", json_array());
	json_object_set_new(c, "rejected", json_array());
	for (k = 0; k < 4; k++)
		json_array_append_new(json_object_get(c, "applied"),
		    json_integer((json_int_t)eng->counters.applied[k]));
	for (k = 0; k < ENGINE_NREJECT; k++)
		json_array_append_new(json_object_get(c, "rejected"),
		    json_integer((json_int_t)eng->counters.rejected[k]));
	json_object_set_new(c, "findings",
	    json_integer((json_int_t)eng->counters.findings));
	return json_pack("{s:s, s:i, s:o, s:I, s:o, s:o}", "format",
	    STATE_FORMAT, "version", STATE_VERSION, "now", sreal(eng->now),
	    "event", (json_int_t)eng->event, "counters", c, "experiments", a);
}

/* Find the guardrail a saved test belongs to; -1 when it changed. */
static int
restore_guardrail(const struct conf *conf, const json_t *to)
{
	const char *name = json_string_value(json_object_get(to, "guardrail"));
	const char *metric = json_string_value(json_object_get(to, "metric"));
	const char *test = json_string_value(json_object_get(to, "test"));
	int g;

	if (name == NULL || metric == NULL || test == NULL)
		return -1;
	for (g = 0; g < conf->nguardrails; g++)
		if (strcmp(conf->guardrails[g].name, name) == 0 &&
		    strcmp(conf->guardrails[g].metric, metric) == 0 &&
		    strcmp(conf_test_name(conf->guardrails[g].test),
		    test) == 0)
			return g;
	return -1;
}

static int	closing_fill(struct engine *, struct experiment *,
		    const json_t *, char **);

/*
 * Fill a freshly made experiment (its id and plan set) from its image:
 * the current epoch's tallies, tests and SRM state.
 */
static int
exp_fill(struct engine *eng, struct experiment *e, const json_t *o,
    char **cause)
{
	const json_t *a, *v, *srm, *ser, *sv;
	const char *id = e->id, *hex;
	int narms = e->narms, g;
	size_t i, j;
	uint32_t cap = eng->conf->history_points;

	e->epoch = (uint32_t)json_integer_value(json_object_get(o, "epoch"));
	if (e->epoch == 0)
		e->epoch = 1;
	if ((v = json_object_get(o, "family")) != NULL) {
		/* a fixed family: its guardrails still configured, its size
		 * as planned (a guardrail removed since still counts) */
		uint64_t mask = 0;
		int k;
		json_array_foreach(json_object_get(v, "guardrails"), i, sv) {
			const char *gn = json_string_value(sv);
			for (k = 0; gn != NULL && k < eng->conf->nguardrails;
			    k++)
				if (strcmp(eng->conf->guardrails[k].name,
				    gn) == 0)
					mask |= (uint64_t)1 << k;
		}
		k = (int)json_integer_value(json_object_get(v, "n"));
		if (k < 1 || k > CONF_GUARDRAILS_MAX) {
			xasprintf(cause, "experiment %s: bad family", id);
			return -1;
		}
		engine_family_set(eng, e, mask, k);
	}
	a = json_object_get(o, "exposures");
	for (i = 0; i < (size_t)narms; i++)
		e->exposures[i] = (uint64_t)json_integer_value(
		    json_array_get(a, i));
	srm = json_object_get(o, "srm");
	a = json_object_get(srm, "a");
	for (i = 0; i < (size_t)narms; i++)
		e->srm_a[i] = aget(a, i);
	get_real(srm, "log_e", &e->srm_log_e);
	get_real(srm, "max_log_e", &e->srm_max_log_e);
	e->srm_fired = json_is_true(json_object_get(srm, "fired"));
	get_real(srm, "first_ts", &e->srm_first_ts);
	e->srm_first_event = (uint64_t)json_integer_value(json_object_get(srm,
	    "first_event"));
	hist_load(&e->srm_hist, json_object_get(srm, "hist"), cap);
	a = json_object_get(srm, "late");
	for (i = 0; i < (size_t)narms && i < json_array_size(a); i++)
		e->srm_late[i] = (uint64_t)json_integer_value(
		    json_array_get(a, i));
	a = json_object_get(srm, "ahead");
	for (i = 0; i < (size_t)narms && i < json_array_size(a); i++)
		e->srm_ahead[i] = (uint64_t)json_integer_value(
		    json_array_get(a, i));
	/* an image without the flag: assume producer stamps (waits) */
	e->srm_stamped = json_object_get(srm, "stamped") == NULL ||
	    json_is_true(json_object_get(srm, "stamped"));
	if (get_real(srm, "floor", &e->srm_floor) != 0 ||
	    isnan(e->srm_floor))
		e->srm_floor = -INFINITY;
	a = json_object_get(srm, "top");
	if (json_array_size(a) <= ENGINE_SRM_QUORUM) {
		e->srm_ntop = (int)json_array_size(a);
		(void)reals_load(a, e->srm_top, (size_t)e->srm_ntop);
	}
	e->late_epoch = (uint64_t)json_integer_value(json_object_get(o,
	    "late_epoch"));
	/* older images have none: 0, as no input was untrusted then */
	e->untrusted_records = (uint64_t)json_integer_value(
	    json_object_get(o, "untrusted_records"));
	if ((hex = json_string_value(json_object_get(o, "unit_key"))) !=
	    NULL) {
		unsigned int byte;
		if (strlen(hex) != 32) {
			xasprintf(cause, "experiment %s: bad unit key", id);
			return -1;
		}
		for (i = 0; i < 16; i++) {
			if (sscanf(hex + 2 * i, "%2x", &byte) != 1) {
				xasprintf(cause, "experiment %s: bad unit key",
				    id);
				return -1;
			}
			e->unit_key[i] = (uint8_t)byte;
		}
	}
	if (get_real(srm, "newest", &e->srm_newest) == 0 &&
	    !isnan(e->srm_newest)) {
		e->srm_done = (int64_t)json_integer_value(json_object_get(srm,
		    "done"));
		if (srm_ring_load(e, json_object_get(srm, "open")) != 0) {
			xasprintf(cause, "experiment %s: bad SRM intervals", id);
			return -1;
		}
	} else
		e->srm_newest = NAN;
	a = json_object_get(o, "epochs");
	e->nepochs = 0;
	json_array_foreach(a, i, v) {
		struct epoch_info *ep;
		if (e->nepochs == ENGINE_EPOCHS_KEPT)
			break;
		ep = &e->epochs[e->nepochs++];
		ep->epoch = (uint32_t)json_integer_value(json_object_get(v,
		    "epoch"));
		get_real(v, "started", &ep->started);
		if (arms_load(json_object_get(v, "arms"), ep->arms,
		    &ep->narms) != 0) {
			xasprintf(cause, "experiment %s: bad epoch entry", id);
			return -1;
		}
	}
	a = json_object_get(o, "metrics");
	json_array_foreach(a, i, v) {
		const char *name = json_string_value(json_object_get(v,
		    "name"));
		struct metric *m;
		int kind = (int)json_integer_value(json_object_get(v, "kind"));
		if (name == NULL || !proto_name_ok(name, strlen(name)) ||
		    (kind != METRIC_OBSERVE && kind != METRIC_COUNT) ||
		    (uint32_t)e->nmetrics >= eng->conf->max_metrics) {
			xasprintf(cause, "experiment %s: bad metric entry", id);
			return -1;
		}
		e->metrics = xreallocarray(e->metrics, (size_t)e->nmetrics + 1,
		    sizeof *e->metrics);
		m = &e->metrics[e->nmetrics++];
		memset(m, 0, sizeof *m);
		snprintf(m->name, sizeof m->name, "%s", name);
		m->len = (uint8_t)strlen(m->name);
		m->kind = (enum metric_kind)kind;
		engine_metric_needs(eng->conf, m);
		engine_metric_alloc_series(eng, e, m);
		eng->counters.series += (uint64_t)e->narms;
		/* images from before event-time alignment have none */
		if (get_real(v, "wm", &m->wm) != 0)
			m->wm = -INFINITY;
		if (get_real(v, "arrived", &m->arrived) != 0)
			m->arrived = 0;
		m->stamped = json_is_true(json_object_get(v, "stamped"));
		ser = json_object_get(v, "series");
		json_array_foreach(ser, j, sv) {
			struct series *s;
			const json_t *mm = json_object_get(sv, "m");
			const json_t *rr = json_object_get(sv, "r");
			const char *b64 = json_string_value(
			    json_object_get(sv, "sketch"));
			if (j >= (size_t)e->narms)
				break;
			s = &m->arm[j];
			s->m.n = (uint64_t)json_integer_value(
			    json_array_get(mm, 0));
			s->m.mean = aget(mm, 1);
			s->m.m2 = aget(mm, 2);
			s->r.records = (uint64_t)json_integer_value(
			    json_array_get(rr, 0));
			s->r.k = aget(rr, 1);
			s->r.n = aget(rr, 2);
			s->r.kk = aget(rr, 3);
			s->r.kn = aget(rr, 4);
			s->r.nn = aget(rr, 5);
			if (json_object_get(sv, "groups") != NULL &&
			    groups_load(s, json_object_get(sv, "groups"),
			    eng->conf->unit_groups) != 0) {
				xasprintf(cause, "experiment %s: metric %s: "
				    "bad unit groups", id, name);
				return -1;
			}
			if (get_real(sv, "latest", &s->hq.latest) != 0)
				s->hq.latest = -INFINITY;
			if (held_load(e, s, json_object_get(sv, "held")) != 0) {
				xasprintf(cause, "experiment %s: metric %s: "
				    "bad held records", id, name);
				return -1;
			}
			if (b64 != NULL && s->sk != NULL) {
				struct sketch *sk = sketch_load(b64);
				if (sk == NULL) {
					xasprintf(cause, "experiment %s: "
					    "metric %s: bad sketch", id, name);
					return -1;
				}
				sketch_free(s->sk);
				s->sk = sk;
			}
		}
	}
	engine_link_tests(eng, e);
	a = json_object_get(o, "tests");
	json_array_foreach(a, i, v) {
		const char *variant = json_string_value(json_object_get(v,
		    "variant"));
		struct test *t = NULL;
		int k;
		if ((g = restore_guardrail(eng->conf, v)) < 0 ||
		    variant == NULL)
			continue;	/* guardrail changed: test restarts */
		for (k = 0; k < e->ntests; k++)
			if (e->tests[k].g == g &&
			    strcmp(e->tests[k].variant, variant) == 0)
				t = &e->tests[k];
		if (t == NULL)
			continue;
		t->verdict = (enum verdict)json_integer_value(
		    json_object_get(v, "verdict"));
		fields_load(v, t);
		for (k = 0; k < 2; k++) {
			const json_t *q = json_object_get(v, k ?
			    "qg_treatment" : "qg_control");
			struct series tmp;
			if (q == NULL)
				continue;
			memset(&tmp, 0, sizeof tmp);
			if (get_real(q, "x0", &t->qx0[k]) != 0 ||
			    groups_load(&tmp, json_object_get(q, "groups"),
			    eng->conf->unit_groups) != 0) {
				xasprintf(cause, "experiment %s: bad quantile "
				    "groups", id);
				return -1;
			}
			t->qg[k] = tmp.grp;
		}
		if (json_object_get(v, "change") != NULL &&
		    change_load(t, json_object_get(v, "change")) != 0) {
			xasprintf(cause, "experiment %s: bad change detector",
			    id);
			return -1;
		}
		hist_load(&t->hist, json_object_get(v, "hist"), cap);
	}
	get_real(o, "last_ts", &e->last_ts);
	e->last_event = (uint64_t)json_integer_value(json_object_get(o,
	    "last_event"));
	if ((v = json_object_get(o, "closing")) != NULL)
		return closing_fill(eng, e, v, cause);
	return 0;
}

/* The epoch still closing when the image was written (engine.c). */
static int
closing_fill(struct engine *eng, struct experiment *e, const json_t *o,
    char **cause)
{
	struct proto_arm arms[PROTO_PLAN_MAX];
	struct experiment *c;
	int narms;

	if (json_object_get(o, "closing") != NULL ||
	    arms_load(json_object_get(o, "arms"), arms, &narms) != 0) {
		xasprintf(cause, "experiment %s: bad closing epoch", e->id);
		return -1;
	}
	c = engine_exp_make(eng, e->id, arms, narms, 0);
	c->is_closing = 1;
	c->owner = e;
	e->closing = c;
	if (exp_fill(eng, c, o, cause) != 0)
		return -1;
	if (get_real(o, "until", &c->closing_until) != 0 ||
	    !isfinite(c->closing_until)) {
		xasprintf(cause, "experiment %s: bad closing epoch", e->id);
		return -1;
	}
	c->closing_records = (uint64_t)json_integer_value(json_object_get(o,
	    "records"));
	return 0;
}

static int
exp_restore(struct engine *eng, const json_t *o, char **cause)
{
	struct proto_arm arms[PROTO_PLAN_MAX];
	struct experiment *e;
	const char *id = json_string_value(json_object_get(o, "id"));
	int narms;

	if (id == NULL || !proto_name_ok(id, strlen(id)) ||
	    arms_load(json_object_get(o, "arms"), arms, &narms) != 0) {
		xasprintf(cause, "experiment entry without a valid id or plan");
		return -1;
	}
	if (nmap_get(eng->index, id, strlen(id), &(uint32_t){0}) == 0) {
		/* planned in the config: the saved state replaces it */
		uint32_t slot;
		nmap_get(eng->index, id, strlen(id), &slot);
		engine_exp_free(eng->exps[slot]);
		eng->recent = NULL;
		eng->exps[slot] = eng->exps[--eng->nexps];
		if (eng->pool != NULL)
			eng->pool->used--;
		nmap_del(eng->index, id, strlen(id));
		if (slot < eng->nexps)
			nmap_put(eng->index, eng->exps[slot]->id,
			    strlen(eng->exps[slot]->id), slot);
	}
	e = engine_exp_new(eng, id, arms, narms, 0);
	return exp_fill(eng, e, o, cause);
}

static struct engine *
engine_restore_as(const struct conf *conf, const uint8_t hashkey[16],
    const json_t *state, int shard, char **cause)
{
	struct engine *eng;
	const json_t *a, *v, *c;
	const char *fmt = json_string_value(json_object_get(state, "format"));
	size_t i;
	int k;

	if (fmt == NULL || strcmp(fmt, STATE_FORMAT) != 0) {
		xasprintf(cause, "not a stopcock engine state");
		return NULL;
	}
	if (json_integer_value(json_object_get(state, "version")) !=
	    STATE_VERSION) {
		xasprintf(cause, "engine state version %lld, expected %d",
		    (long long)json_integer_value(json_object_get(state,
		    "version")), STATE_VERSION);
		return NULL;
	}
	a = json_object_get(state, "experiments");
	if (!json_is_array(a)) {
		xasprintf(cause, "engine state without experiments");
		return NULL;
	}
	eng = engine_make(conf, hashkey, shard);
	json_array_foreach(a, i, v) {
		if (eng->nexps >= eng->conf->max_experiments) {
			xasprintf(cause, "state holds more experiments than "
			    "max_experiments (%u)", eng->conf->max_experiments);
			engine_free(eng);
			return NULL;
		}
		if (exp_restore(eng, v, cause) != 0) {
			engine_free(eng);
			return NULL;
		}
	}
	get_real(state, "now", &eng->now);
	eng->event = (uint64_t)json_integer_value(json_object_get(state,
	    "event"));
	c = json_object_get(state, "counters");
	for (k = 0; k < 4; k++)
		eng->counters.applied[k] = (uint64_t)json_integer_value(
		    json_array_get(json_object_get(c, "applied"), (size_t)k));
	for (k = 0; k < ENGINE_NREJECT; k++)
		eng->counters.rejected[k] = (uint64_t)json_integer_value(
		    json_array_get(json_object_get(c, "rejected"), (size_t)k));
	eng->counters.findings = (uint64_t)json_integer_value(
	    json_object_get(c, "findings"));
	return eng;
}

struct engine *
engine_restore(const struct conf *conf, const uint8_t hashkey[16],
    const json_t *state, char **cause)
{
	return engine_restore_as(conf, hashkey, state, 0, cause);
}

struct engine *
engine_restore_shard(const struct conf *conf, const uint8_t hashkey[16],
    const json_t *state, char **cause)
{
	return engine_restore_as(conf, hashkey, state, 1, cause);
}
