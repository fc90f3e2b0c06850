/*
 * engine_codec.c: the JSON form of each part of an experiment's state,
 * saved and read back by engine_image.c. A load checks what it reads
 * (sizes, bounds, types) and fails (-1 or NULL) rather than fill a part
 * half; infinities travel as the strings "inf"/"-inf" and NaN as null,
 * so running intersections come back exactly as saved.
 */
#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <openssl/evp.h>

#include "stopcock/util.h"
#include "engine_codec.h"

json_t *
engine_codec_real(double x)
{
	if (isfinite(x))
		return json_real(x);
	if (isnan(x))
		return json_null();
	return json_string(x > 0 ? "inf" : "-inf");
}

int
engine_codec_get_real(const json_t *o, const char *k, double *out)
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

double
engine_codec_at(const json_t *a, size_t i)
{
	const json_t *v = json_array_get(a, i);

	if (json_is_number(v))
		return json_number_value(v);
	if (json_is_string(v))
		return strcmp(json_string_value(v), "-inf") == 0 ? -INFINITY :
		    INFINITY;
	return NAN;
}

json_t *
engine_codec_hist_save(const struct hist *h)
{
	json_t *a = json_array();
	uint32_t i;

	for (i = 0; i < h->n; i++)
		json_array_append_new(a, json_pack("[o, o, o, o, o]",
		    engine_codec_real(h->pt[i].t), engine_codec_real(h->pt[i].a), engine_codec_real(h->pt[i].b),
		    engine_codec_real(h->pt[i].c), engine_codec_real(h->pt[i].p)));
	return json_pack("{s:o, s:i, s:i}", "points", a, "stride",
	    (int)h->stride, "skip", (int)h->skip);
}

void
engine_codec_hist_load(struct hist *h, const json_t *o, uint32_t cap)
{
	const json_t *a = json_object_get(o, "points"), *p;
	size_t i;

	memset(h, 0, sizeof *h);
	json_array_foreach(a, i, p) {
		if (i >= cap)
			break;
		hist_offer(h, cap, engine_codec_at(p, 0), engine_codec_at(p, 1), engine_codec_at(p, 2),
		    engine_codec_at(p, 3), engine_codec_at(p, 4));
	}
	h->stride = (uint32_t)json_integer_value(json_object_get(o,
	    "stride"));
	h->skip = (uint32_t)json_integer_value(json_object_get(o, "skip"));
}

json_t *
engine_codec_arms_save(const struct proto_arm *arms, int narms)
{
	json_t *a = json_array();
	int i;

	for (i = 0; i < narms; i++)
		json_array_append_new(a, json_pack("[s, f]", arms[i].name,
		    arms[i].weight));
	return a;
}

int
engine_codec_arms_load(const json_t *a, struct proto_arm *arms, int *narms)
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
		arms[i].weight = engine_codec_at(v, 1);
		if (!(arms[i].weight > 0))
			return -1;
	}
	*narms = (int)json_array_size(a);
	return 0;
}

json_t *
engine_codec_sketch_save(const struct sketch *sk)
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

struct sketch *
engine_codec_sketch_load(const char *b64)
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

json_t *
engine_codec_groups_save(const struct groups *g)
{
	json_t *sa = json_array(), *na = json_array();
	uint32_t i;

	for (i = 0; i < g->G; i++) {
		json_array_append_new(sa, engine_codec_real(g->sn[2 * (size_t)i]));
		json_array_append_new(na, engine_codec_real(g->sn[2 * (size_t)i + 1]));
	}
	/* the design effect's cache too, so a restored engine looks with
	 * the same variances as the one that saved it */
	return json_pack("{s:I, s:o, s:o, s:[o, o, o]}", "seq",
	    (json_int_t)g->seq, "s", sa, "n", na, "deff", engine_codec_real(g->deff_at),
	    engine_codec_real(g->deff), engine_codec_real(g->gv));
}

/* Held metric records: [t, a, b, h] each, h's bits as a signed integer. */
json_t *
engine_codec_held_save(const struct heldq *q)
{
	json_t *a = json_array();
	const struct held *r;
	json_int_t h;
	uint32_t i;

	for (i = 0; i < q->n; i++) {
		r = &q->q[(q->head + i) % q->cap];
		memcpy(&h, &r->h, sizeof h);
		json_array_append_new(a, json_pack("[o, o, o, I]", engine_codec_real(r->t),
		    engine_codec_real(r->a), engine_codec_real(r->b), h));
	}
	return a;
}

int
engine_codec_held_load(struct experiment *e, struct series *s, const json_t *a)
{
	const json_t *v;
	struct held r;
	json_int_t h;
	size_t i;

	json_array_foreach(a, i, v) {
		if (e->held >= ENGINE_HELD_MAX || json_array_size(v) != 4)
			return -1;
		r.t = engine_codec_at(v, 0);
		r.a = engine_codec_at(v, 1);
		r.b = engine_codec_at(v, 2);
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
int
engine_codec_groups_load(struct series *sr, const json_t *o, uint32_t Gmax)
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
		sr->grp->sn[2 * i] = engine_codec_at(sa, i);
		sr->grp->sn[2 * i + 1] = engine_codec_at(na, i);
		if (!isfinite(sr->grp->sn[2 * i]) ||
		    !isfinite(sr->grp->sn[2 * i + 1]))
			return -1;
		sr->grp->used += sr->grp->sn[2 * i + 1] != 0;
	}
	if ((d = json_object_get(o, "deff")) != NULL) {
		sr->grp->deff_at = engine_codec_at(d, 0);
		sr->grp->deff = engine_codec_at(d, 1);
		sr->grp->gv = engine_codec_at(d, 2);
		if (!(sr->grp->deff_at >= 0) || !isfinite(sr->grp->deff))
			sr->grp->deff_at = sr->grp->deff = sr->grp->gv = 0;
	}
	return 0;
}

/* The SRM test's open intervals: [interval, count per arm...] rows. */
json_t *
engine_codec_srm_ring_save(const struct experiment *e)
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

int
engine_codec_srm_ring_load(struct experiment *e, const json_t *rows)
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

json_t *
engine_codec_reals_save(const double *x, size_t n)
{
	json_t *a = json_array();
	size_t i;

	for (i = 0; i < n; i++)
		json_array_append_new(a, engine_codec_real(x[i]));
	return a;
}

/* Fill x[0..n) from an array of exactly n numbers (nan, +-inf allowed). */
int
engine_codec_reals_load(const json_t *a, double *x, size_t n)
{
	size_t i;

	if (!json_is_array(a) || json_array_size(a) != n)
		return -1;
	for (i = 0; i < n; i++)
		x[i] = json_is_null(json_array_get(a, i)) ? NAN : engine_codec_at(a, i);
	return 0;
}

/* A test's change detector, block snapshot and recent windows. */
json_t *
engine_codec_change_save(const struct test *t)
{
	json_t *o, *w = json_array();
	int i;

	o = json_pack("{s:b, s:b, s:b, s:o, s:o, s:o, s:o, s:i, s:o}", "on",
	    t->det_on, "alarm", t->det_alarm, "by_detector", t->by_detector,
	    "log_m", engine_codec_real(t->det_log_m), "start", engine_codec_real(t->det_start),
	    "block_ts", engine_codec_real(t->blk_ts), "snap", engine_codec_reals_save(&t->snap[0][0],
	    6), "k", t->det.k, "blocks", engine_codec_real(t->det.blocks));
	json_object_set_new(o, "quantile_x0", engine_codec_real(t->qd_x0));
	json_object_set_new(o, "quantile_cum", engine_codec_reals_save(&t->qd_cum[0][0],
	    6));
	json_object_set_new(o, "lambda", engine_codec_reals_save(t->det.lambda,
	    STATS_DETECT_GRID));
	json_object_set_new(o, "log_w", engine_codec_reals_save(t->det.log_w,
	    STATS_DETECT_GRID));
	json_object_set_new(o, "log_mk", engine_codec_reals_save(t->det.log_m,
	    STATS_DETECT_GRID));
	json_object_set_new(o, "startk", engine_codec_reals_save(t->det.start,
	    STATS_DETECT_GRID));
	for (i = 0; i < CHANGE_WINDOWS; i++)
		json_array_append_new(w, json_pack("{s:i, s:i, s:o, s:o}",
		    "head", t->win[i].head, "n", t->win[i].n, "ts",
		    engine_codec_reals_save(t->win[i].ts, CHANGE_WIN_SLOTS), "snap",
		    engine_codec_reals_save(&t->win[i].snap[0][0][0], CHANGE_WIN_SLOTS * 6)));
	json_object_set_new(o, "windows", w);
	return o;
}

int
engine_codec_change_load(struct test *t, const json_t *o)
{
	const json_t *w, *wi;
	size_t i;

	t->det_on = json_is_true(json_object_get(o, "on"));
	t->det_alarm = json_is_true(json_object_get(o, "alarm"));
	t->by_detector = json_is_true(json_object_get(o, "by_detector"));
	t->det.k = (int)json_integer_value(json_object_get(o, "k"));
	if (t->det.k < 0 || t->det.k > STATS_DETECT_GRID ||
	    engine_codec_get_real(o, "log_m", &t->det_log_m) != 0 ||
	    engine_codec_get_real(o, "start", &t->det_start) != 0 ||
	    engine_codec_get_real(o, "block_ts", &t->blk_ts) != 0 ||
	    engine_codec_get_real(o, "blocks", &t->det.blocks) != 0 ||
	    engine_codec_reals_load(json_object_get(o, "snap"), &t->snap[0][0], 6) != 0 ||
	    engine_codec_reals_load(json_object_get(o, "lambda"), t->det.lambda,
	    STATS_DETECT_GRID) != 0 ||
	    engine_codec_reals_load(json_object_get(o, "log_w"), t->det.log_w,
	    STATS_DETECT_GRID) != 0 ||
	    engine_codec_reals_load(json_object_get(o, "log_mk"), t->det.log_m,
	    STATS_DETECT_GRID) != 0 ||
	    engine_codec_reals_load(json_object_get(o, "startk"), t->det.start,
	    STATS_DETECT_GRID) != 0)
		return -1;
	if (t->det_on && stats_detect_check(&t->det) != 0)
		return -1;
	/* images from before quantile detection have none: it restarts */
	if (engine_codec_get_real(o, "quantile_x0", &t->qd_x0) != 0)
		t->qd_x0 = NAN;
	if (json_object_get(o, "quantile_cum") == NULL ||
	    engine_codec_reals_load(json_object_get(o, "quantile_cum"), &t->qd_cum[0][0],
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
		    engine_codec_reals_load(json_object_get(wi, "ts"), cw->ts,
		    CHANGE_WIN_SLOTS) != 0 ||
		    engine_codec_reals_load(json_object_get(wi, "snap"),
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

void
engine_codec_fields_save(json_t *to, const struct test *t)
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
			    engine_codec_real(*(const double *)(base + f->off)));
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

void
engine_codec_fields_load(const json_t *v, struct test *t)
{
	char *base = (char *)t;
	const struct test_field *f;
	double *d;
	size_t i;

	for (i = 0; i < sizeof test_fields / sizeof *test_fields; i++) {
		f = &test_fields[i];
		switch (f->type) {
		case FIELD_REAL:
			(void)engine_codec_get_real(v, f->key, (double *)(base + f->off));
			break;
		case FIELD_LOOKS:
			d = (double *)(base + f->off);
			if (engine_codec_get_real(v, f->key, d) != 0 || isnan(*d))
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
