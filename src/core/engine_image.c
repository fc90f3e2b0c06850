/*
 * engine_image.c: the full state image the daemon checkpoints
 * (engine_save, engine_restore): every tally, sketch, unit group, held
 * record, SRM interval, test state and detector, so a restore continues
 * exactly where the save stopped. The image keeps infinities as the
 * strings "inf"/"-inf" so the running intersections come back as saved.
 * A restore refuses an image it cannot read whole; it never half-loads.
 * The parts' codecs are in engine_codec.c; this file assembles them.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_codec.h"

#define STATE_FORMAT "stopcock-engine"
#define STATE_VERSION 1

static json_t *
exp_save(const struct experiment *e, const struct conf *conf)
{
	json_t *o, *a, *m, *arms, *tests;
	int i, j;

	o = json_pack("{s:s, s:i, s:o}", "id", e->id, "epoch", (int)e->epoch,
	    "arms", engine_codec_arms_save(e->arms, e->narms));
	a = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(a, json_integer(
		    (json_int_t)e->exposures[i]));
	json_object_set_new(o, "exposures", a);
	a = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(a, engine_codec_real(e->srm_a[i]));
	json_object_set_new(o, "srm", json_pack(
	    "{s:o, s:o, s:o, s:b, s:o, s:I, s:o}", "a", a, "log_e",
	    engine_codec_real(e->srm_log_e), "max_log_e", engine_codec_real(e->srm_max_log_e),
	    "fired", e->srm_fired, "first_ts", engine_codec_real(e->srm_first_ts),
	    "first_event", (json_int_t)e->srm_first_event, "hist",
	    engine_codec_hist_save(&e->srm_hist)));
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
	json_object_set_new(json_object_get(o, "srm"), "top", engine_codec_reals_save(
	    e->srm_top, (size_t)e->srm_ntop));
	json_object_set_new(json_object_get(o, "srm"), "floor",
	    engine_codec_real(e->srm_floor));
	json_object_set_new(json_object_get(o, "srm"), "stamped",
	    json_boolean(e->srm_stamped));
	if (!isnan(e->srm_newest)) {
		json_object_set_new(json_object_get(o, "srm"), "done",
		    json_integer((json_int_t)e->srm_done));
		json_object_set_new(json_object_get(o, "srm"), "newest",
		    engine_codec_real(e->srm_newest));
		json_object_set_new(json_object_get(o, "srm"), "open",
		    engine_codec_srm_ring_save(e));
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
		    engine_codec_real(e->epochs[i].started), "arms",
		    engine_codec_arms_save(e->epochs[i].arms, e->epochs[i].narms)));
	json_object_set_new(o, "epochs", a);
	a = json_array();
	for (i = 0; i < e->nmetrics; i++) {
		const struct metric *mt = &e->metrics[i];
		arms = json_array();
		for (j = 0; mt->arm && j < e->narms; j++) {
			const struct series *s = &mt->arm[j];
			m = json_pack("{s:[I, o, o], s:[I, o, o, o, o, o]}",
			    "m", (json_int_t)s->m.n, engine_codec_real(s->m.mean),
			    engine_codec_real(s->m.m2), "r", (json_int_t)s->r.records,
			    engine_codec_real((double)s->r.k), engine_codec_real((double)s->r.n),
			    engine_codec_real((double)s->r.kk), engine_codec_real((double)s->r.kn),
			    engine_codec_real((double)s->r.nn));
			if (s->sk)
				json_object_set_new(m, "sketch",
				    engine_codec_sketch_save(s->sk));
			if (s->grp)
				json_object_set_new(m, "groups",
				    engine_codec_groups_save(s->grp));
			json_object_set_new(m, "latest", engine_codec_real(s->hq.latest));
			if (s->hq.n > 0)
				json_object_set_new(m, "held",
				    engine_codec_held_save(&s->hq));
			json_array_append_new(arms, m);
		}
		json_array_append_new(a, json_pack("{s:s, s:i, s:o, s:o, s:o, "
		    "s:b}", "name", mt->name, "kind", (int)mt->kind, "series",
		    arms, "wm", engine_codec_real(mt->wm), "arrived", engine_codec_real(mt->arrived),
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
		engine_codec_fields_save(to, t);
		json_object_set_new(to, "change", engine_codec_change_save(t));
		for (j = 0; j < 2; j++)
			if (t->qg[j] != NULL)
				json_object_set_new(to, j ? "qg_treatment" :
				    "qg_control", json_pack("{s:o, s:o}", "x0",
				    engine_codec_real(t->qx0[j]), "groups",
				    engine_codec_groups_save(t->qg[j])));
		json_object_set_new(to, "hist", engine_codec_hist_save(&t->hist));
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
	json_object_set_new(o, "last_ts", engine_codec_real(e->last_ts));
	json_object_set_new(o, "last_event",
	    json_integer((json_int_t)e->last_event));
	if (e->closing != NULL) {
		json_t *c = exp_save(e->closing, conf);
		json_object_set_new(c, "until",
		    engine_codec_real(e->closing->closing_until));
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
	    STATE_FORMAT, "version", STATE_VERSION, "now", engine_codec_real(eng->now),
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
		e->srm_a[i] = engine_codec_at(a, i);
	engine_codec_get_real(srm, "log_e", &e->srm_log_e);
	engine_codec_get_real(srm, "max_log_e", &e->srm_max_log_e);
	e->srm_fired = json_is_true(json_object_get(srm, "fired"));
	engine_codec_get_real(srm, "first_ts", &e->srm_first_ts);
	e->srm_first_event = (uint64_t)json_integer_value(json_object_get(srm,
	    "first_event"));
	engine_codec_hist_load(&e->srm_hist, json_object_get(srm, "hist"), cap);
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
	if (engine_codec_get_real(srm, "floor", &e->srm_floor) != 0 ||
	    isnan(e->srm_floor))
		e->srm_floor = -INFINITY;
	a = json_object_get(srm, "top");
	if (json_array_size(a) <= ENGINE_SRM_QUORUM) {
		e->srm_ntop = (int)json_array_size(a);
		(void)engine_codec_reals_load(a, e->srm_top, (size_t)e->srm_ntop);
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
	if (engine_codec_get_real(srm, "newest", &e->srm_newest) == 0 &&
	    !isnan(e->srm_newest)) {
		e->srm_done = (int64_t)json_integer_value(json_object_get(srm,
		    "done"));
		if (engine_codec_srm_ring_load(e, json_object_get(srm, "open")) != 0) {
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
		engine_codec_get_real(v, "started", &ep->started);
		if (engine_codec_arms_load(json_object_get(v, "arms"), ep->arms,
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
		if (engine_codec_get_real(v, "wm", &m->wm) != 0)
			m->wm = -INFINITY;
		if (engine_codec_get_real(v, "arrived", &m->arrived) != 0)
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
			s->m.mean = engine_codec_at(mm, 1);
			s->m.m2 = engine_codec_at(mm, 2);
			s->r.records = (uint64_t)json_integer_value(
			    json_array_get(rr, 0));
			s->r.k = engine_codec_at(rr, 1);
			s->r.n = engine_codec_at(rr, 2);
			s->r.kk = engine_codec_at(rr, 3);
			s->r.kn = engine_codec_at(rr, 4);
			s->r.nn = engine_codec_at(rr, 5);
			if (json_object_get(sv, "groups") != NULL &&
			    engine_codec_groups_load(s, json_object_get(sv, "groups"),
			    eng->conf->unit_groups) != 0) {
				xasprintf(cause, "experiment %s: metric %s: "
				    "bad unit groups", id, name);
				return -1;
			}
			if (engine_codec_get_real(sv, "latest", &s->hq.latest) != 0)
				s->hq.latest = -INFINITY;
			if (engine_codec_held_load(e, s, json_object_get(sv, "held")) != 0) {
				xasprintf(cause, "experiment %s: metric %s: "
				    "bad held records", id, name);
				return -1;
			}
			if (b64 != NULL && s->sk != NULL) {
				struct sketch *sk = engine_codec_sketch_load(b64);
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
		engine_codec_fields_load(v, t);
		for (k = 0; k < 2; k++) {
			const json_t *q = json_object_get(v, k ?
			    "qg_treatment" : "qg_control");
			struct series tmp;
			if (q == NULL)
				continue;
			memset(&tmp, 0, sizeof tmp);
			if (engine_codec_get_real(q, "x0", &t->qx0[k]) != 0 ||
			    engine_codec_groups_load(&tmp, json_object_get(q, "groups"),
			    eng->conf->unit_groups) != 0) {
				xasprintf(cause, "experiment %s: bad quantile "
				    "groups", id);
				return -1;
			}
			t->qg[k] = tmp.grp;
		}
		if (json_object_get(v, "change") != NULL &&
		    engine_codec_change_load(t, json_object_get(v, "change")) != 0) {
			xasprintf(cause, "experiment %s: bad change detector",
			    id);
			return -1;
		}
		engine_codec_hist_load(&t->hist, json_object_get(v, "hist"), cap);
	}
	engine_codec_get_real(o, "last_ts", &e->last_ts);
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
	    engine_codec_arms_load(json_object_get(o, "arms"), arms, &narms) != 0) {
		xasprintf(cause, "experiment %s: bad closing epoch", e->id);
		return -1;
	}
	c = engine_exp_make(eng, e->id, arms, narms, 0);
	c->is_closing = 1;
	c->owner = e;
	e->closing = c;
	if (exp_fill(eng, c, o, cause) != 0)
		return -1;
	if (engine_codec_get_real(o, "until", &c->closing_until) != 0 ||
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
	    engine_codec_arms_load(json_object_get(o, "arms"), arms, &narms) != 0) {
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
	engine_codec_get_real(state, "now", &eng->now);
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
