/*
 * engine.c: the one entry point of the core. engine_apply() routes a
 * parsed record to its experiment, epoch, arm and metric, updates the
 * tallies and runs the cheap tests; engine_tick() runs the costly ones
 * (quantiles, rate confidence sequences) and takes chart points. Verdict
 * changes leave through the sink. No I/O, no clock: time comes in with
 * every call, so the daemon, replay, the simulator and the tests all see
 * exactly the same engine. An experiment's life (tests, epochs, plans,
 * retirement) is in engine_exp.c, a reload in engine_reconf.c.
 *
 * Memory is allocated only when an experiment, metric or test appears,
 * and every such appearance is capped (max_experiments, max_variants,
 * max_metrics), so hostile cardinality costs a counter, not memory.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_int.h"


static const char *reject_names[ENGINE_NREJECT] = {
	"ok", "unplanned", "unknown_variant", "cap_experiments",
	"cap_variants", "cap_metrics", "kind_mismatch", "k_exceeds_n",
	"closed_epoch", "future_epoch", "unknown_guardrail", "implausible",
	"undeclared", "untrusted_input",
};

const char *
engine_reason(enum engine_reject r)
{
	return (unsigned)r < ENGINE_NREJECT ? reject_names[r] : "unknown";
}

const char *
verdict_name(enum verdict v)
{
	switch (v) {
	case VERDICT_HARM:
		return "harm";
	case VERDICT_SAFE:
		return "safe";
	default:
		return "undecided";
	}
}

/* ---- chart history ---- */

void
hist_offer(struct hist *h, uint32_t cap, double t, double a, double b,
    double c, double p)
{
	uint32_t i;

	if (cap < 2)
		return;
	if (h->stride == 0)
		h->stride = 1;
	if (h->n > 0 && ++h->skip < h->stride)
		return;
	h->skip = 0;
	if (h->cap < cap) {
		/* grow geometrically up to the configured bound */
		uint32_t ncap = h->cap ? h->cap * 2 : 8;
		if (ncap > cap)
			ncap = cap;
		h->pt = xreallocarray(h->pt, ncap, sizeof *h->pt);
		h->cap = ncap;
	}
	if (h->n == cap) {
		/* full: keep every other point and halve the rate */
		for (i = 0; i < cap / 2; i++)
			h->pt[i] = h->pt[2 * i + 1];
		h->n = cap / 2;
		h->stride *= 2;
	}
	h->pt[h->n].t = t;
	h->pt[h->n].a = (float)a;
	h->pt[h->n].b = (float)b;
	h->pt[h->n].c = (float)c;
	h->pt[h->n].p = (float)p;
	h->n++;
}

void
hist_free(struct hist *h)
{
	free(h->pt);
	memset(h, 0, sizeof *h);
}

/* ---- experiments: lookups and series (their life: engine_exp.c) ---- */

struct experiment *
engine_find(const struct engine *eng, const char *id)
{
	uint32_t slot;

	if (nmap_get(eng->index, id, strlen(id), &slot) != 0)
		return NULL;
	return eng->exps[slot];
}

/*
 * Two names held in char[PROTO_NAME_MAX + 1] arrays (a record's fields,
 * the engine's copies): equal, compared eight bytes at a time. The word
 * holding a's terminating NUL is compared up to and including it (the
 * bytes after it may be anything); the lowest byte the zero-byte test
 * flags is always a true zero (Mycroft's test, as in Hacker's Delight
 * 6-1). Both arrays are read only within their PROTO_NAME_MAX + 1 bytes.
 */
_Static_assert(PROTO_NAME_MAX % 8 == 0, "name words");
static inline int
name_eq(const char *a, const char *b)
{
#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ == __ORDER_LITTLE_ENDIAN__
	const uint64_t ones = 0x0101010101010101ULL;
	uint64_t x, y, z;
	int i, p;

	for (i = 0; i < PROTO_NAME_MAX; i += 8) {
		memcpy(&x, a + i, 8);
		memcpy(&y, b + i, 8);
		if ((z = (x - ones) & ~x & (ones << 7)) != 0) {
			p = __builtin_ctzll(z);		/* bit 7 of the NUL */
			return ((x ^ y) & (p == 63 ? ~0ULL :
			    (1ULL << (p + 1)) - 1)) == 0;
		}
		if (x != y)
			return 0;
	}
	return b[PROTO_NAME_MAX] == '\0';	/* a is 64 bytes long */
#else
	return strcmp(a, b) == 0;
#endif
}

/*
 * The record path's lookup: producers send a unit's records together, so
 * the experiment of the previous record is checked first, by name, before
 * hashing. id is a record's experiment field.
 */
static struct experiment *
exp_find_recent(struct engine *eng, const char *id)
{
	struct experiment *e = eng->recent;

	if (e != NULL && name_eq(id, e->id))
		return e;
	if ((e = engine_find(eng, id)) != NULL)
		eng->recent = e;
	return e;
}

/* arm_find for a record's variant field (name_eq). */
static int
arm_find_record(const struct experiment *e, const char *name)
{
	int i;

	for (i = 0; i < e->narms; i++)
		if (name_eq(name, e->arms[i].name))
			return i;
	return -1;
}

void
engine_groups_free(struct groups *g)
{
	if (g == NULL)
		return;
	free(g->sn);
	free(g);
}

static struct groups *
groups_new(uint32_t G)
{
	struct groups *g = xcalloc(1, sizeof *g);

	g->G = G;
	g->sn = xcalloc(2 * (size_t)G, sizeof *g->sn);
	return g;
}

/*
 * Add one record to its unit's group. The group index comes from the
 * unit's SipHash under the experiment's own key, drawn from the engine
 * key when the experiment appears and kept in the state image, so a
 * restart (with a new engine key) keeps every unit in its group and two
 * experiments never share a grouping (the assignment hash of the
 * producer is unknown to us and must not line up with ours). Records of
 * a grouped series that name no unit are their own units: round robin.
 */
static void
groups_add(struct engine *eng, struct groups **gp, uint64_t h, double num,
    double den)
{
	struct groups *g;
	double *c;
	uint32_t gi;

	if (*gp == NULL) {
		if (h == 0)
			return;
		*gp = groups_new(eng->conf->unit_groups);
		eng->counters.grouped_series++;
	}
	g = *gp;
	/* h >> 32 fits 32 bits: the same index by a 32-bit division */
	if (h != 0)
		gi = (uint32_t)(h >> 32) % g->G;
	else
		gi = (uint32_t)(g->seq++ % g->G);
	c = &g->sn[2 * (size_t)gi];
	if (c[1] == 0 && den != 0)
		g->used++;
	c[0] += num;
	c[1] += den;
}

/*
 * Quantile tests on a grouped metric also count, per group, the records
 * above a threshold x0 frozen from the arm's own sketch once it holds
 * ENGINE_QUANTILE_FREEZE records: the design effect of that exceedance
 * indicator stands for the quantile's (docs/methods.md sec. 14).
 */
static void
groups_add_quantiles(struct engine *eng, struct experiment *e, int mi,
    int arm, const struct held *r)
{
	const struct metric *m = &e->metrics[mi];
	struct test *t;
	int i, side;

	for (i = 0; i < e->ntests; i++) {
		t = &e->tests[i];
		if (t->metric != mi || (arm != 0 && t->arm != arm) ||
		    eng->conf->guardrails[t->g].test != TEST_QUANTILE)
			continue;
		side = arm == 0 ? 0 : 1;
		if (isnan(t->qx0[side])) {
			if (m->arm[arm].sk == NULL || sketch_count(
			    m->arm[arm].sk) < ENGINE_QUANTILE_FREEZE)
				continue;
			t->qx0[side] = sketch_quantile(m->arm[arm].sk,
			    eng->conf->guardrails[t->g].quantile);
		}
		groups_add(eng, &t->qg[side], r->h, r->a > t->qx0[side], 1);
	}
}

int
engine_metric_alloc_series(struct engine *eng, struct experiment *e,
    struct metric *m)
{
	int i;

	m->arm = xcalloc((size_t)e->narms, sizeof *m->arm);
	for (i = 0; i < e->narms; i++)
		m->arm[i].hq.latest = -INFINITY;
	m->wm = -INFINITY;
	if (m->want_sketch)
		for (i = 0; i < e->narms; i++)
			m->arm[i].sk = sketch_new(eng->conf->sketch_accuracy,
			    eng->conf->sketch_buckets);
	return 0;
}

/* Guardrail-derived needs of a metric. */
void
engine_metric_needs(const struct conf *conf, struct metric *m)
{
	int i;

	m->want_sketch = m->want_k_le_n = 0;
	m->vmin = -INFINITY;
	m->vmax = INFINITY;
	for (i = 0; i < conf->nguardrails; i++) {
		if (strcmp(conf->guardrails[i].metric, m->name) != 0)
			continue;
		/* the narrowest plausible range of the guardrails reading it
		 * (a guardrail without bounds has -1e300 and 1e300) */
		if (conf->guardrails[i].vmin < conf->guardrails[i].vmax) {
			m->vmin = fmax(m->vmin, conf->guardrails[i].vmin);
			m->vmax = fmin(m->vmax, conf->guardrails[i].vmax);
		}
		if (conf->guardrails[i].test == TEST_QUANTILE)
			m->want_sketch = 1;
		if (conf->guardrails[i].test == TEST_PROPORTION)
			m->want_k_le_n = 1;
	}
}

/* ---- findings ---- */

void
engine_emit(struct engine *eng, const struct finding *f)
{
	eng->counters.findings++;
	if (eng->sink != NULL)
		eng->sink(eng->sink_arg, f);
}

/* ---- the engine ---- */

struct engine *
engine_make(const struct conf *conf, const uint8_t hashkey[16], int shard)
{
	struct engine *eng;
	const struct conf_experiment *ce;
	int i;

	eng = xcalloc(1, sizeof *eng);
	eng->conf = conf_dup(conf);
	eng->clock = NAN;
	eng->shard = shard;
	memcpy(eng->key, hashkey, sizeof eng->key);
	eng->index = nmap_new(eng->key);
	for (i = 0; !shard && i < conf->nexperiments; i++) {
		ce = &conf->experiments[i];
		if (ce->narms >= 2 && engine_find(eng, ce->id) == NULL &&
		    eng->nexps < eng->conf->max_experiments)
			(void)engine_exp_apply_plan(eng, ce->arms, ce->narms, ce->id,
			    NULL, 0);
	}
	return eng;
}

struct engine *
engine_new(const struct conf *conf, const uint8_t hashkey[16])
{
	return engine_make(conf, hashkey, 0);
}

struct engine *
engine_new_shard(const struct conf *conf, const uint8_t hashkey[16])
{
	return engine_make(conf, hashkey, 1);
}

/* A shard plans a configured experiment when its first record comes. */
static struct experiment *
exp_find_or_configured(struct engine *eng, const char *id, double now,
    enum engine_reject *rc)
{
	const struct conf_experiment *ce;
	struct experiment *e;

	if ((e = exp_find_recent(eng, id)) != NULL || !eng->shard ||
	    (ce = conf_experiment_find(eng->conf, id)) == NULL ||
	    ce->narms < 2)
		return e;
	if ((*rc = engine_exp_apply_plan(eng, ce->arms, ce->narms, ce->id, NULL,
	    now)) != ENGINE_OK)
		return NULL;
	return exp_find_recent(eng, id);
}

void
engine_free(struct engine *eng)
{
	uint32_t i;

	if (eng == NULL)
		return;
	engine_set_pool(eng, NULL);
	for (i = 0; i < eng->nexps; i++)
		engine_exp_free(eng->exps[i]);
	free(eng->exps);
	nmap_free(eng->index);
	conf_free(eng->conf);
	free(eng->scratch_v);
	free(eng->scratch_c);
	free(eng->view_lo);
	free(eng->view_hi);
	free(eng->view_c);
	free(eng);
}

void
engine_set_sink(struct engine *eng, engine_sink sink, void *arg)
{
	eng->sink = sink;
	eng->sink_arg = arg;
}

void
engine_set_pool(struct engine *eng, struct engine_pool *pool)
{
	if (eng->pool != NULL)
		eng->pool->used -= eng->nexps;
	eng->pool = pool;
	if (pool != NULL)
		pool->used += eng->nexps;
}

/* Find or create the metric of a record (name: its metric field); 0 or a
 * reject reason. */
static enum engine_reject
metric_for(struct engine *eng, struct experiment *e, const char *name,
    enum metric_kind kind, struct metric **out)
{
	struct metric *m;
	int i, j;

	for (i = 0; i < e->nmetrics; i++)
		if (name_eq(name, e->metrics[i].name))
			break;
	if (i == e->nmetrics) {
		if ((uint32_t)e->nmetrics >= eng->conf->max_metrics)
			return ENGINE_E_METRICS;
		/* a metric a guardrail reads must arrive as that guardrail's
		 * record kind */
		for (j = 0; j < eng->conf->nguardrails; j++) {
			const struct conf_guardrail *g =
			    &eng->conf->guardrails[j];
			int obs = g->test == TEST_MEAN ||
			    g->test == TEST_QUANTILE;
			if (strcmp(g->metric, name) == 0 &&
			    obs != (kind == METRIC_OBSERVE))
				return ENGINE_E_MISMATCH;
		}
		e->metrics = xreallocarray(e->metrics, (size_t)e->nmetrics + 1,
		    sizeof *e->metrics);
		m = &e->metrics[e->nmetrics];
		memset(m, 0, sizeof *m);
		snprintf(m->name, sizeof m->name, "%s", name);
		m->len = (uint8_t)strlen(m->name);
		m->kind = kind;
		engine_metric_needs(eng->conf, m);
		engine_metric_alloc_series(eng, e, m);
		e->nmetrics++;
		eng->counters.series += (uint64_t)e->narms;
		engine_link_tests(eng, e);
		i = e->nmetrics - 1;
	}
	m = &e->metrics[i];
	if (m->kind != kind)
		return ENGINE_E_MISMATCH;
	*out = m;
	return ENGINE_OK;
}

/* Cheap tests reading metric mi, for one arm (all treatments when the
 * control moved). */
static void
evaluate_metric(struct engine *eng, struct experiment *e, int mi, int arm)
{
	struct test *t;
	int i;

	for (i = 0; i < e->ntests; i++) {
		t = &e->tests[i];
		if (t->metric != mi || (arm != 0 && t->arm != arm))
			continue;
		t->dirty = 1;
		verdict_evaluate(eng, e, t, 0);
	}
}

/* Add one metric record to its arm's tallies and run the cheap tests. */
void
engine_fold(struct engine *eng, struct experiment *e, int mi, int arm,
    const struct held *r)
{
	struct metric *m = &e->metrics[mi];
	struct series *s = &m->arm[arm];

	if (m->kind == METRIC_OBSERVE) {
		tally_moments_add(&s->m, r->a);
		if (s->sk != NULL)
			sketch_add(s->sk, r->a, 1);
		groups_add(eng, &s->grp, r->h, r->a, 1);
		if (s->grp != NULL && m->want_sketch)
			groups_add_quantiles(eng, e, mi, arm, r);
	} else {
		tally_ratio_add(&s->r, r->a, r->b);
		groups_add(eng, &s->grp, r->h, r->a, r->b);
	}
	evaluate_metric(eng, e, mi, arm);
}

/*
 * May a guardrail of this family pause? fixed: the family is the mask;
 * else every configured guardrail applies.
 */
static int
family_may_pause(const struct engine *eng, int fixed, uint64_t mask)
{
	int g;

	for (g = 0; g < eng->conf->nguardrails; g++)
		if ((!fixed || ((mask >> g) & 1)) &&
		    eng->conf->guardrails[g].action == ACTION_PAUSE)
			return 1;
	return 0;
}

/*
 * Untrusted records (record.untrusted) never reach an experiment a
 * guardrail may pause, unless its [experiment] section accepts them: a
 * forger who reaches an unsigned input can then neither steer such an
 * experiment into a pause nor dilute the evidence of a real one. The
 * family of an experiment not yet planned is the one apply_plan would
 * fix.
 */
static int
untrusted_refused(struct engine *eng, const struct record *r,
    const struct experiment *e)
{
	const struct conf_experiment *ce;
	const char *family;
	uint64_t mask = 0;
	int n = 0, fixed;

	ce = conf_experiment_find(eng->conf, r->experiment);
	if (ce != NULL && ce->accept_untrusted)
		return 0;
	if (e != NULL)
		return family_may_pause(eng, e->fam_fixed, e->fam_mask);
	family = r->family_len > 0 ? r->family :
	    ce != NULL ? ce->guardrails : NULL;
	fixed = family != NULL &&
	    engine_family_parse(eng->conf, family, &mask, &n) == 0;
	return family_may_pause(eng, fixed, mask);
}

enum engine_reject
engine_apply(struct engine *eng, const struct record *r, double now,
    uint64_t event)
{
	struct experiment *e;
	struct metric *m;
	struct held h;
	enum metric_kind kind;
	enum engine_reject rc = ENGINE_OK;
	int arm;

	eng->now = now;
	eng->event = event;
	if (r->kind == PROTO_PLAN) {
		/* with declared_only a record cannot plan what the config
		 * does not name: forged plans cannot fill max_experiments */
		if (eng->conf->declared_only &&
		    conf_experiment_find(eng->conf, r->experiment) == NULL) {
			rc = ENGINE_E_UNDECLARED;
			goto done;
		}
		if (r->untrusted && untrusted_refused(eng, r,
		    engine_find(eng, r->experiment))) {
			rc = ENGINE_E_UNTRUSTED;
			goto done;
		}
		rc = engine_exp_apply_plan(eng, r->arms, r->narms, r->experiment,
		    r->family_len > 0 ? r->family : NULL,
		    r->has_ts && r->ts < now ? r->ts : now);
		goto done;
	}
	if ((e = exp_find_or_configured(eng, r->experiment, now, &rc)) ==
	    NULL) {
		if (rc == ENGINE_OK)
			rc = ENGINE_E_UNPLANNED;
		goto done;
	}
	if (r->untrusted && untrusted_refused(eng, r, e)) {
		rc = ENGINE_E_UNTRUSTED;
		goto done;
	}
	e->last_ts = now;
	e->last_event = event;
	e->touched = eng->clock;
	/*
	 * A record names the epoch its unit was exposed in (epoch=): one of
	 * the epoch still closing counts there; one of an epoch closed for
	 * good must not land in the current one's tallies.
	 */
	if (r->epoch != 0 && r->epoch != e->epoch) {
		if (e->closing == NULL || r->epoch != e->closing->epoch) {
			rc = r->epoch < e->epoch ? ENGINE_E_CLOSED_EPOCH :
			    ENGINE_E_FUTURE_EPOCH;
			if (rc == ENGINE_E_CLOSED_EPOCH)
				e->late_epoch++;
			goto done;
		}
		e = e->closing;
	}
	if ((arm = arm_find_record(e, r->variant)) < 0) {
		rc = ENGINE_E_VARIANT;
		goto done;
	}
	if (e->is_closing) {
		e->closing_records++;
		eng->counters.closing_records++;
	}
	switch (r->kind) {
	case PROTO_EXPOSE:
		/* a closing epoch's SRM test is over: counted only */
		if (e->is_closing) {
			e->exposures[arm] += r->units;
			break;
		}
		e->exposures[arm] += r->units;
		/* event time: the record's own stamp, even when a caller's
		 * clock (replay: the newest record time) runs ahead of it */
		if (r->has_ts)
			e->srm_stamped = 1;
		srm_expose(eng, e, arm, r->units, r->has_ts ? r->ts : now);
		break;
	case PROTO_OBSERVE:
	case PROTO_COUNT:
		kind = r->kind == PROTO_OBSERVE ? METRIC_OBSERVE : METRIC_COUNT;
		if ((rc = metric_for(eng, e, r->metric, kind, &m)) !=
		    ENGINE_OK)
			goto done;
		if (kind == METRIC_COUNT && m->want_k_le_n && r->k > r->n) {
			rc = ENGINE_E_K_GT_N;
			goto done;
		}
		/* a value no guardrail finds plausible never reaches a test:
		 * forged or broken (1e9 ms latencies) is refused, counted */
		if (kind == METRIC_OBSERVE && (r->value < m->vmin ||
		    r->value > m->vmax)) {
			rc = ENGINE_E_IMPLAUSIBLE;
			goto done;
		}
		h.t = r->has_ts ? r->ts : now;
		h.a = kind == METRIC_OBSERVE ? r->value : r->k;
		h.b = kind == METRIC_OBSERVE ? 1 : r->n;
		h.h = r->unit_len > 0 ?
		    siphash24(e->unit_key, r->unit, r->unit_len) | 1 : 0;
		align_offer(eng, e, (int)(m - e->metrics), arm, &h,
		    r->has_ts);
		break;
	default:
		break;
	}
	if (rc == ENGINE_OK && r->untrusted)
		e->untrusted_records++;
done:
	if (rc == ENGINE_OK)
		eng->counters.applied[r->kind]++;
	else
		eng->counters.rejected[rc]++;
	return rc;
}

/* Costly tests and chart points of one experiment; returns the number
 * of costly looks taken. */
static uint32_t
tick_experiment(struct engine *eng, struct experiment *e, double now)
{
	struct test *t;
	uint32_t looks = 0, cap = eng->conf->history_points;
	enum conf_test kind;
	int j;

	/*
	 * Evidence is stamped with the time of the latest record it
	 * reflects, not the tick's clock, so a backlog replayed late charts
	 * (and fires) at the time the data describe.
	 */
	if (e->closing != NULL) {
		if (now >= e->closing->closing_until)
			engine_exp_retire_closing(eng, e);
		else
			looks += tick_experiment(eng, e->closing, now);
	}
	eng->now = e->last_ts > 0 ? e->last_ts : now;
	align_tick(eng, e, now);
	for (j = 0; j < e->ntests; j++) {
		t = &e->tests[j];
		kind = eng->conf->guardrails[t->g].test;
		if (t->dirty) {
			/* mean and proportion were evaluated on apply */
			if (kind == TEST_QUANTILE || kind == TEST_RATE) {
				verdict_evaluate(eng, e, t, 1);
				looks++;
			}
			t->dirty = 0;
		}
		if (t->hist_dirty && !e->is_closing) {
			hist_offer(&t->hist, cap, eng->now, t->est, t->cs_lo,
			    t->cs_hi, stats_p_from_log_e(t->max_log_e));
			t->hist_dirty = 0;
		}
	}
	/*
	 * Exposures stamped on arrival come in time order: once the clock
	 * is past an interval's end by the lateness, no exposure can still
	 * land in it, so the tick completes it even when no newer exposure
	 * arrives. Producer-stamped ones (a backlog) wait for newer ones.
	 */
	if (e->is_closing)
		return looks;
	if (!e->srm_stamped && !isnan(e->srm_newest))
		srm_complete(eng, e, srm_interval_of(eng, now -
		    eng->conf->lateness));
	if (e->srm_dirty) {
		hist_offer(&e->srm_hist, cap, eng->now, e->srm_log_e,
		    log(1 / e->srm_alpha), 0,
		    stats_p_from_log_e(e->srm_max_log_e));
		e->srm_dirty = 0;
	}
	return looks;
}

/*
 * One tick. Experiments are visited in turn from where the previous tick
 * stopped; once tick_budget costly looks were taken the tick ends, so its
 * cost stays bounded however many experiments are busy. Deferred tests
 * keep their dirty mark and are looked at on a later tick; looking on a
 * subsequence keeps every guarantee.
 */
void
engine_tick(struct engine *eng, double now)
{
	uint32_t i, k, looks = 0, budget = eng->conf->tick_budget;

	eng->clock = now;
	for (i = 0; i < eng->nexps; i++)
		if (isnan(eng->exps[i]->touched))
			eng->exps[i]->touched = now;
	if (eng->nexps == 0) {
		eng->now = now;
		return;
	}
	if (eng->cursor >= eng->nexps)
		eng->cursor = 0;
	for (k = 0; k < eng->nexps; k++) {
		i = (eng->cursor + k) % eng->nexps;
		looks += tick_experiment(eng, eng->exps[i], now);
		if (!eng->force && budget > 0 && looks >= budget) {
			eng->cursor = (i + 1) % eng->nexps;
			break;
		}
	}
	eng->now = now;
}

void
engine_finish(struct engine *eng, double now)
{
	uint32_t i;

	for (i = 0; i < eng->nexps; i++) {
		engine_exp_retire_closing(eng, eng->exps[i]);
		align_flush(eng, eng->exps[i]);
		srm_flush(eng, eng->exps[i]);
	}
	eng->force = 1;
	engine_tick(eng, now);
	eng->force = 0;
}

/* Memory one experiment holds (a closing epoch is counted apart). */
static size_t
exp_bytes(const struct experiment *e)
{
	size_t bytes;
	int j, k;

	bytes = (size_t)e->srm_slots * (size_t)e->narms * sizeof *e->srm_ring;
	for (j = 0; j < e->ntests; j++)
		for (k = 0; k < 2; k++)
			if (e->tests[j].qg[k] != NULL)
				bytes += sizeof(struct groups) +
				    e->tests[j].qg[k]->G * 16;
	bytes += sizeof *e + (size_t)e->nmetrics * sizeof *e->metrics +
	    (size_t)e->testcap * sizeof *e->tests +
	    (e->epochs ? ENGINE_EPOCHS_KEPT * sizeof *e->epochs : 0) +
	    e->srm_hist.cap * sizeof(struct hist_point);
	for (j = 0; j < e->nmetrics; j++) {
		if (e->metrics[j].arm == NULL)
			continue;
		bytes += (size_t)e->narms * sizeof(struct series);
		for (k = 0; k < e->narms; k++) {
			bytes += (size_t)e->metrics[j].arm[k].hq.cap *
			    sizeof(struct held);
			if (e->metrics[j].arm[k].sk)
				bytes += sketch_bytes(e->metrics[j].arm[k].sk);
			if (e->metrics[j].arm[k].grp)
				bytes += sizeof(struct groups) +
				    e->metrics[j].arm[k].grp->G * 16;
		}
	}
	for (j = 0; j < e->ntests; j++)
		bytes += e->tests[j].hist.cap * sizeof(struct hist_point);
	return bytes;
}

void
engine_counters(const struct engine *eng, struct engine_counters *c)
{
	uint32_t i;
	size_t bytes = sizeof *eng + nmap_bytes(eng->index) +
	    eng->capexps * sizeof *eng->exps;
	uint64_t tests = 0, held = 0;

	for (i = 0; i < eng->nexps; i++) {
		bytes += exp_bytes(eng->exps[i]);
		if (eng->exps[i]->closing != NULL)
			bytes += exp_bytes(eng->exps[i]->closing);
		tests += (uint64_t)eng->exps[i]->ntests;
		held += eng->exps[i]->held;
		if (eng->exps[i]->closing != NULL)
			held += eng->exps[i]->closing->held;
	}
	*c = eng->counters;
	c->held = held;
	c->experiments = eng->nexps;
	c->tests = tests;
	c->bytes = bytes;
}

static void
foreach_exp(const struct engine *eng, const struct experiment *e,
    void (*cb)(void *, const struct finding *), void *arg)
{
	struct finding f;
	int j;

	finding_fill_srm(eng, e, FINDING_SRM, &f);
	cb(arg, &f);
	for (j = 0; j < e->ntests; j++) {
		if (e->tests[j].arm <= 0)
			continue;
		finding_fill(eng, e, &e->tests[j], FINDING_VERDICT, &f);
		cb(arg, &f);
	}
}

void
engine_foreach(const struct engine *eng,
    void (*cb)(void *, const struct finding *), void *arg)
{
	uint32_t i;

	for (i = 0; i < eng->nexps; i++)
		foreach_exp(eng, eng->exps[i], cb, arg);
}

int
engine_foreach_in(const struct engine *eng, const char *id,
    void (*cb)(void *, const struct finding *), void *arg)
{
	const struct experiment *e = engine_find(eng, id);

	if (e == NULL)
		return -1;
	foreach_exp(eng, e, cb, arg);
	return 0;
}
