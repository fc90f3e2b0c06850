/*
 * engine.c: the one entry point of the core. engine_apply() routes a
 * parsed record to its experiment, epoch, arm and metric, updates the
 * tallies and runs the cheap tests; engine_tick() runs the costly ones
 * (quantiles, rate confidence sequences) and takes chart points. Verdict
 * changes leave through the sink. No I/O, no clock: time comes in with
 * every call, so the daemon, replay, the simulator and the tests all see
 * exactly the same engine.
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

/* ---- experiments ---- */

static struct experiment *
exp_find(const struct engine *eng, const char *id)
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
	if ((e = exp_find(eng, id)) != NULL)
		eng->recent = e;
	return e;
}

static int
arm_find(const struct experiment *e, const char *name)
{
	int i;

	for (i = 0; i < e->narms; i++)
		if (strcmp(e->arms[i].name, name) == 0)
			return i;
	return -1;
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

static void
groups_free(struct groups *g)
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

static void
series_free(struct metric *m, int narms)
{
	int i;

	if (m->arm == NULL)
		return;
	for (i = 0; i < narms; i++) {
		sketch_free(m->arm[i].sk);
		groups_free(m->arm[i].grp);
		free(m->arm[i].hq.q);
	}
	free(m->arm);
	m->arm = NULL;
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

static int
metric_find(const struct experiment *e, const char *name)
{
	int i;
	size_t len = strlen(name);

	for (i = 0; i < e->nmetrics; i++)
		if (e->metrics[i].len == len &&
		    memcmp(e->metrics[i].name, name, len) == 0)
			return i;
	return -1;
}

static void
test_reset_epoch(struct test *t)
{
	int i;

	t->closed_log_e += t->log_e;
	t->log_e = 0;
	t->verdict = VERDICT_UNDECIDED;
	t->cs_lo = -INFINITY;
	t->cs_hi = INFINITY;
	t->est = t->lo = t->hi = NAN;
	t->rel = t->rel_lo = t->rel_hi = NAN;
	t->ctl_value = t->trt_value = NAN;
	t->ctl_lo = t->ctl_hi = t->trt_lo = t->trt_hi = NAN;
	t->margin_abs = NAN;
	t->deff = 0;
	t->first_ts = NAN;
	t->first_event = 0;
	t->pause_sent = 0;
	t->cs_n = t->ev_n = 0;
	t->dirty = t->hist_dirty = 0;
	t->by_detector = 0;
	t->sig2_t = t->sig2_c = 0;
	t->qd_x0 = NAN;
	memset(t->qd_cum, 0, sizeof t->qd_cum);
	t->est_closing = 0;
	change_reset(t);
	for (i = 0; i < 2; i++) {
		groups_free(t->qg[i]);
		t->qg[i] = NULL;
		t->qx0[i] = NAN;
	}
}

static void
test_init(struct test *t, int g, const char *variant)
{
	memset(t, 0, sizeof *t);
	t->g = g;
	snprintf(t->variant, sizeof t->variant, "%s", variant);
	t->arm = -1;
	t->metric = -1;
	test_reset_epoch(t);
	t->closed_log_e = 0;
}

/* Link every test to its arm and metric in the current epoch. */
void
engine_link_tests(const struct engine *eng, struct experiment *e)
{
	int i;
	struct test *t;

	for (i = 0; i < e->ntests; i++) {
		t = &e->tests[i];
		t->arm = arm_find(e, t->variant);
		t->metric = metric_find(e, eng->conf->guardrails[t->g].metric);
	}
}

_Static_assert(CONF_GUARDRAILS_MAX <= 64, "a family is a 64-bit mask");

/* 1 when guardrail g applies to e (is in its family). */
static int
exp_applies(const struct experiment *e, int g)
{
	return !e->fam_fixed || (e->fam_mask >> g & 1);
}

/*
 * A family list: names separated by ',' or blanks, each a configured
 * guardrail. 0 with the mask and count, or -1 when one is unknown.
 */
int
engine_family_parse(const struct conf *c, const char *list, uint64_t *mask,
    int *n)
{
	const char *p = list, *q;
	size_t len;
	int g;

	*mask = 0;
	*n = 0;
	for (;;) {
		while (*p == ',' || *p == ' ' || *p == '\t')
			p++;
		if (*p == '\0')
			return 0;
		for (q = p; *q != '\0' && *q != ',' && *q != ' ' &&
		    *q != '\t'; q++)
			;
		len = (size_t)(q - p);
		for (g = 0; g < c->nguardrails; g++)
			if (strlen(c->guardrails[g].name) == len &&
			    memcmp(c->guardrails[g].name, p, len) == 0)
				break;
		if (g == c->nguardrails)
			return -1;
		if (!(*mask >> g & 1))
			(*n)++;
		*mask |= (uint64_t)1 << g;
		p = q;
	}
}

/* Make sure a test exists for every guardrail x treatment arm. */
static void
exp_ensure_tests(const struct engine *eng, struct experiment *e)
{
	int g, j, i, found;

	for (g = 0; g < eng->conf->nguardrails; g++) {
		if (!exp_applies(e, g))
			continue;
		for (j = 1; j < e->narms; j++) {
			found = 0;
			for (i = 0; i < e->ntests && !found; i++)
				found = e->tests[i].g == g &&
				    strcmp(e->tests[i].variant,
				    e->arms[j].name) == 0;
			if (found)
				continue;
			if (e->ntests == e->testcap) {
				e->testcap = e->testcap ? e->testcap * 2 : 8;
				e->tests = xreallocarray(e->tests,
				    (size_t)e->testcap, sizeof *e->tests);
			}
			test_init(&e->tests[e->ntests++], g, e->arms[j].name);
		}
	}
	engine_link_tests(eng, e);
}

static void
exp_settings(const struct engine *eng, struct experiment *e)
{
	const struct conf *c = eng->conf;
	const struct conf_experiment *ce = conf_experiment_find(c, e->id);
	int treat = e->narms - 1;

	e->alpha = ce && ce->alpha > 0 ? ce->alpha : c->alpha;
	e->srm_alpha = ce && ce->srm_alpha > 0 ? ce->srm_alpha : c->srm_alpha;
	e->plan_units = ce && ce->plan_units > 0 ? ce->plan_units :
	    c->plan_units;
	/*
	 * Bonferroni over the family's guardrails (every configured one
	 * unless the plan named them) x treatment arms, fixed by the plan
	 * rather than by which metrics happen to arrive, so the family cannot
	 * follow the data (docs/methods.md sec. 6).
	 */
	e->family = (e->fam_fixed ? e->fam_n : c->nguardrails) *
	    (treat > 0 ? treat : 1);
	if (e->family < 1)
		e->family = 1;
}

/* SRM state for a new epoch: Dirichlet(k0 theta0) prior. */
static void
exp_srm_start(const struct engine *eng, struct experiment *e)
{
	double sum = 0, k0;
	uint32_t slots;
	int i;

	for (i = 0; i < e->narms; i++)
		sum += e->arms[i].weight;
	/* HRMS-derived concentration, tightest at the planned total
	 * (docs/methods.md sec. 3); fixed before any exposure is seen. */
	k0 = stats_dm_k0(e->plan_units * e->narms, e->srm_alpha);
	if (!(k0 > 0))
		k0 = 100;
	for (i = 0; i < e->narms; i++) {
		e->theta0[i] = e->arms[i].weight / sum;
		e->srm_a[i] = k0 * e->theta0[i];
		e->exposures[i] = 0;
		e->srm_late[i] = e->srm_ahead[i] = 0;
	}
	/* open intervals span the lateness plus the one being filled, and
	 * headroom for exposures newer than the quorum's newest */
	slots = (uint32_t)ceil(eng->conf->lateness /
	    eng->conf->srm_interval) + 2 + ENGINE_SRM_HEADROOM;
	if (slots > ENGINE_SRM_SLOTS_MAX)
		slots = ENGINE_SRM_SLOTS_MAX;
	free(e->srm_ring);
	e->srm_slots = slots;
	e->srm_ring = xcalloc((size_t)slots * (size_t)e->narms,
	    sizeof *e->srm_ring);
	/*
	 * A new plan may arrive after exposures stamped past its start:
	 * those went to the old epoch's open intervals, which are dropped.
	 * Exposures up to the end of the interval holding the newest one
	 * seen are late for the new epoch too, in every arm alike, so the
	 * new epoch's first interval is not missing one arm's batch.
	 */
	e->srm_floor = e->srm_ntop > 0 ? (floor(e->srm_top[e->srm_ntop - 1] /
	    eng->conf->srm_interval) + 1) * eng->conf->srm_interval : -INFINITY;
	e->srm_done = INT64_MIN;
	e->srm_newest = NAN;
	e->srm_ntop = 0;
	e->srm_log_e = e->srm_max_log_e = 0;
	e->srm_fired = 0;
	e->untrusted_records = 0;
	e->srm_first_ts = NAN;
	e->srm_first_event = 0;
}

static void
exp_push_epoch(struct experiment *e, double now)
{
	struct epoch_info *ep;

	if (e->nepochs == ENGINE_EPOCHS_KEPT) {
		memmove(e->epochs, e->epochs + 1,
		    (ENGINE_EPOCHS_KEPT - 1) * sizeof *e->epochs);
		e->nepochs--;
	}
	if (e->epochs == NULL)
		e->epochs = xcalloc(ENGINE_EPOCHS_KEPT, sizeof *e->epochs);
	ep = &e->epochs[e->nepochs++];
	ep->epoch = e->epoch;
	ep->started = now;
	ep->narms = e->narms;
	memcpy(ep->arms, e->arms, sizeof ep->arms);
}

/* The experiment's unit-group key: SipHash of its name under the engine
 * key, twice (the second time of the name and a suffix). */
static void
exp_unit_key(const struct engine *eng, struct experiment *e)
{
	char buf[PROTO_NAME_MAX + 2];
	uint64_t a, b;
	size_t n = strlen(e->id);

	a = siphash24(eng->key, e->id, n);
	memcpy(buf, e->id, n);
	buf[n] = '#';
	b = siphash24(eng->key, buf, n + 1);
	memcpy(e->unit_key, &a, 8);
	memcpy(e->unit_key + 8, &b, 8);
}

/* A new experiment in its first epoch, not yet in the engine's index. */
struct experiment *
engine_exp_make(struct engine *eng, const char *id,
    const struct proto_arm *arms, int narms, double now)
{
	struct experiment *e;

	e = xcalloc(1, sizeof *e);
	snprintf(e->id, sizeof e->id, "%s", id);
	exp_unit_key(eng, e);
	e->epoch = 1;
	e->narms = narms;
	memcpy(e->arms, arms, (size_t)narms * sizeof *arms);
	exp_settings(eng, e);
	exp_srm_start(eng, e);
	exp_push_epoch(e, now);
	exp_ensure_tests(eng, e);
	e->last_ts = now;
	e->touched = eng->clock;
	return e;
}

struct experiment *
engine_exp_new(struct engine *eng, const char *id,
    const struct proto_arm *arms, int narms, double now)
{
	struct experiment *e = engine_exp_make(eng, id, arms, narms, now);

	if (eng->nexps == eng->capexps) {
		eng->capexps = eng->capexps ? eng->capexps * 2 : 16;
		eng->exps = xreallocarray(eng->exps, eng->capexps,
		    sizeof *eng->exps);
	}
	nmap_put(eng->index, e->id, strlen(e->id), eng->nexps);
	eng->exps[eng->nexps++] = e;
	eng->counters.experiments = eng->nexps;
	if (eng->pool != NULL)
		eng->pool->used++;
	return e;
}

void
engine_exp_free(struct experiment *e)
{
	int i;

	if (e == NULL)
		return;
	engine_exp_free(e->closing);
	for (i = 0; i < e->nmetrics; i++)
		series_free(&e->metrics[i], e->narms);
	free(e->metrics);
	for (i = 0; i < e->ntests; i++) {
		hist_free(&e->tests[i].hist);
		groups_free(e->tests[i].qg[0]);
		groups_free(e->tests[i].qg[1]);
	}
	free(e->tests);
	hist_free(&e->srm_hist);
	free(e->srm_ring);
	free(e->epochs);
	free(e);
}

/*
 * The closing epoch: at a ramp step the finished epoch's tallies and
 * tests move, as they are, into a closing experiment owned by the live
 * one, and records naming that epoch (epoch=) keep counting there for
 * epoch_grace. Its tests gather evidence only; what their factor gains
 * joins the live test's product of closed epochs (verdict.c
 * verdict_closing). The live experiment keeps the tests' histories and
 * alert state and starts the new epoch with fresh tallies.
 */
static void
closing_open(struct engine *eng, struct experiment *e, double now)
{
	struct experiment *c = xcalloc(1, sizeof *c);
	int i;

	*c = *e;
	c->is_closing = 1;
	c->owner = e;
	c->closing = NULL;
	c->closing_until = now + eng->conf->epoch_grace;
	c->closing_records = 0;
	/* the live experiment keeps the epoch list and the charts */
	c->epochs = NULL;
	c->nepochs = 0;
	memset(&c->srm_hist, 0, sizeof c->srm_hist);
	/* the closing one takes the tallies (series, groups, held records)
	 * and the SRM ring; the live one gets empty metrics by name */
	e->metrics = xcalloc((size_t)(e->nmetrics > 0 ? e->nmetrics : 1),
	    sizeof *e->metrics);
	for (i = 0; i < e->nmetrics; i++) {
		e->metrics[i] = c->metrics[i];
		e->metrics[i].arm = NULL;
	}
	e->srm_ring = NULL;
	e->held = 0;
	/* tests: a copy whose per-epoch parts (quantile groups) it owns */
	c->tests = xreallocarray(NULL, (size_t)(e->ntests > 0 ? e->ntests : 1),
	    sizeof *c->tests);
	memcpy(c->tests, e->tests, (size_t)e->ntests * sizeof *c->tests);
	c->testcap = e->ntests;
	for (i = 0; i < e->ntests; i++) {
		memset(&c->tests[i].hist, 0, sizeof c->tests[i].hist);
		c->tests[i].late_base = c->tests[i].log_e;
		e->tests[i].qg[0] = e->tests[i].qg[1] = NULL;
	}
	e->closing = c;
}

/* Close the closing epoch: apply what it holds, take its last costly
 * looks (their evidence joins the live tests), free it. */
static void
closing_retire(struct engine *eng, struct experiment *e)
{
	struct experiment *c = e->closing;
	int i, force = eng->force;

	if (c == NULL)
		return;
	align_flush(eng, c);
	eng->force = 1;
	for (i = 0; i < c->ntests; i++)
		verdict_evaluate(eng, c, &c->tests[i], 1);
	eng->force = force;
	e->closing = NULL;
	engine_exp_free(c);
}

/*
 * Start a new epoch: tallies and SRM start afresh (never pooled across
 * weights, the trap that turns a ramp into Simpson's paradox); each
 * test's finished epoch martingale is folded into closed_log_e.
 */
static void
exp_new_epoch(struct engine *eng, struct experiment *e,
    const struct proto_arm *arms, int narms, double now, int forget)
{
	struct finding f;
	int i;

	/* an epoch still closing closes now; a reset forgets it */
	if (forget) {
		engine_exp_free(e->closing);
		e->closing = NULL;
	} else
		closing_retire(eng, e);
	/* held records arrived in the finished epoch and belong to it */
	if (!forget && eng->conf->epoch_grace > 0)
		closing_open(eng, e, now);
	else if (!forget)
		align_flush(eng, e);
	for (i = 0; i < e->nmetrics; i++)
		series_free(&e->metrics[i], e->narms);
	e->held = 0;
	e->narms = narms;
	if (arms != e->arms)
		memcpy(e->arms, arms, (size_t)narms * sizeof *arms);
	e->epoch++;
	for (i = 0; i < e->nmetrics; i++) {
		engine_metric_needs(eng->conf, &e->metrics[i]);
		engine_metric_alloc_series(eng, e, &e->metrics[i]);
	}
	for (i = 0; i < e->ntests; i++) {
		test_reset_epoch(&e->tests[i]);
		if (forget) {
			e->tests[i].closed_log_e = 0;
			e->tests[i].max_log_e = 0;
			hist_free(&e->tests[i].hist);
		}
	}
	if (forget)
		hist_free(&e->srm_hist);
	exp_settings(eng, e);
	exp_srm_start(eng, e);
	exp_push_epoch(e, now);
	exp_ensure_tests(eng, e);
	finding_fill_srm(eng, e, FINDING_EPOCH, &f);
	engine_emit(eng, &f);
}

static int
same_plan(const struct experiment *e, const struct proto_arm *arms,
    int narms)
{
	int i;

	if (narms != e->narms)
		return 0;
	for (i = 0; i < narms; i++)
		if (strcmp(arms[i].name, e->arms[i].name) != 0 ||
		    arms[i].weight != e->arms[i].weight)
			return 0;
	return 1;
}

/*
 * A plan. The family is fixed when the experiment first appears: by the
 * plan's own list (guardrails=), else its [experiment] section's, else
 * every configured guardrail; a later plan's list is not looked at, so
 * no family is chosen after the data.
 */
static enum engine_reject
apply_plan(struct engine *eng, const struct proto_arm *arms, int narms,
    const char *id, const char *family, double now)
{
	const struct conf_experiment *ce;
	struct experiment *e;
	uint64_t mask = 0;
	int n = 0;

	if ((uint32_t)narms > eng->conf->max_variants)
		return ENGINE_E_VARIANTS;
	if ((e = exp_find(eng, id)) == NULL) {
		if (eng->nexps >= eng->conf->max_experiments ||
		    (eng->pool != NULL && eng->pool->used >= eng->pool->max))
			return ENGINE_E_EXPERIMENTS;
		if (family == NULL && (ce = conf_experiment_find(eng->conf,
		    id)) != NULL && ce->guardrails != NULL)
			family = ce->guardrails;
		if (family != NULL && engine_family_parse(eng->conf, family,
		    &mask, &n) != 0)
			return ENGINE_E_GUARDRAIL;
		e = engine_exp_new(eng, id, arms, narms, now);
		if (family != NULL)
			engine_family_set(eng, e, mask, n);
		return ENGINE_OK;
	}
	if (!same_plan(e, arms, narms))
		exp_new_epoch(eng, e, arms, narms, now, 0);
	return ENGINE_OK;
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
		if (ce->narms >= 2 && exp_find(eng, ce->id) == NULL &&
		    eng->nexps < eng->conf->max_experiments)
			(void)apply_plan(eng, ce->arms, ce->narms, ce->id,
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
	if ((*rc = apply_plan(eng, ce->arms, ce->narms, ce->id, NULL,
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

/*
 * What defines a guardrail's test: a reload that changes any of these
 * restarts the test's evidence; its name is its identity, and its action
 * only says what harm does, so changing it keeps the evidence. NULL when
 * the definitions agree, else what changed (for the log and webhooks).
 */
static const char *const restart_reasons[] = {
	NULL, "metric changed", "test changed", "quantile changed",
	"harm direction changed", "margin changed", "plan_units changed",
};

const char *
engine_restart_reason(int why)
{
	return why > 0 && (size_t)why < SC_NELEM(restart_reasons) ?
	    restart_reasons[why] : NULL;
}

static int
guardrail_change(const struct conf_guardrail *a, const struct conf_guardrail *b)
{
	if (strcmp(a->metric, b->metric) != 0)
		return 1;
	if (a->test != b->test)
		return 2;
	if (a->quantile != b->quantile)
		return 3;
	if (a->harm != b->harm)
		return 4;
	if (a->margin != b->margin || a->margin_relative != b->margin_relative)
		return 5;
	if (a->plan_units != b->plan_units)
		return 6;
	return 0;
}

static int
guardrail_index(const struct conf *c, const char *name)
{
	int k;

	for (k = 0; k < c->nguardrails; k++)
		if (strcmp(c->guardrails[k].name, name) == 0)
			return k;
	return -1;
}

static void
test_drop(struct test *t)
{
	hist_free(&t->hist);
	groups_free(t->qg[0]);
	groups_free(t->qg[1]);
	t->qg[0] = t->qg[1] = NULL;
}

/*
 * Move the tests of e (live or closing) from the old configuration's
 * guardrails to the new one's, by name. A test whose guardrail is gone is
 * dropped; one whose definition changed is dropped from a closing epoch
 * (its evidence would join a test that restarts) and, in the live
 * experiment, starts afresh in place, its old verdict and the reason left
 * in prev[] and why[] (indexed like e->tests afterwards) for the caller
 * to report.
 */
static void
reconf_tests(struct engine *eng, const struct conf *old, struct experiment *e,
    enum verdict *prev, const char **why)
{
	char variant[PROTO_NAME_MAX + 1];
	const char *change;
	struct test *t;
	enum verdict held;
	int j, k, n = 0, code;

	for (j = 0; j < e->ntests; j++) {
		t = &e->tests[j];
		k = guardrail_index(eng->conf, old->guardrails[t->g].name);
		code = k < 0 ? 0 : guardrail_change(&old->guardrails[t->g],
		    &eng->conf->guardrails[k]);
		change = engine_restart_reason(code);
		if (k < 0 || (change != NULL && e->is_closing)) {
			test_drop(t);
			continue;
		}
		if (n != j)
			e->tests[n] = *t;
		t = &e->tests[n];
		if (prev != NULL) {
			prev[n] = t->verdict;
			why[n] = change;
		}
		if (change != NULL) {
			snprintf(variant, sizeof variant, "%s", t->variant);
			held = t->verdict;
			test_drop(t);
			test_init(t, k, variant);
			t->dirty = 1;
			/* for the API: the test says when and why it began */
			t->restart_ts = isnan(eng->clock) ? eng->now : eng->clock;
			t->restart_why = code;
			t->restart_prev = (int)held;
		} else
			t->g = k;
		n++;
	}
	e->ntests = n;
}

/*
 * Fix e's family to the guardrails in mask (n of them in the alpha
 * split): tests of others go (a new experiment's, so nothing is lost),
 * and the level of each test follows the family.
 */
void
engine_family_set(struct engine *eng, struct experiment *e, uint64_t mask,
    int n)
{
	int j, k = 0;

	e->fam_fixed = 1;
	e->fam_mask = mask;
	e->fam_n = n;
	for (j = 0; j < e->ntests; j++) {
		if (!exp_applies(e, e->tests[j].g)) {
			test_drop(&e->tests[j]);
			continue;
		}
		e->tests[k++] = e->tests[j];
	}
	e->ntests = k;
	exp_settings(eng, e);
	engine_link_tests(eng, e);
}

/* A family's mask under the old configuration, by name under the new. */
static uint64_t
family_remap(const struct conf *old, const struct conf *c, uint64_t mask)
{
	uint64_t out = 0;
	int g, k;

	for (g = 0; g < old->nguardrails; g++)
		if ((mask >> g & 1) &&
		    (k = guardrail_index(c, old->guardrails[g].name)) >= 0)
			out |= (uint64_t)1 << k;
	return out;
}

/* A reload may ask for sketches the metrics did not keep. */
static void
reconf_metrics(struct engine *eng, struct experiment *e)
{
	struct metric *m;
	int j, k;

	for (j = 0; j < e->nmetrics; j++) {
		m = &e->metrics[j];
		engine_metric_needs(eng->conf, m);
		for (k = 0; m->arm && k < e->narms; k++)
			if (m->want_sketch && m->arm[k].sk == NULL)
				m->arm[k].sk = sketch_new(
				    eng->conf->sketch_accuracy,
				    eng->conf->sketch_buckets);
	}
}

/*
 * A reload keeps every test whose guardrail keeps its name and test
 * definition exactly as it was: evidence, verdict, running bounds,
 * detector, history, the closing epoch's part and the held records. A
 * changed definition restarts that test alone, reported as a
 * FINDING_RESTART with the verdict it held; a removed guardrail's test
 * is reported the same way with its last state, then dropped. Nothing
 * is dropped without a finding.
 */
int
engine_reconfigure(struct engine *eng, const struct conf *conf, char **cause)
{
	struct conf *old = eng->conf;
	struct experiment *e;
	struct finding f;
	enum verdict *prev;
	const char **why;
	uint32_t i;
	int j, nkept;

	/* the last word of tests whose guardrail goes, read under the old
	 * configuration that still names it */
	for (i = 0; i < eng->nexps; i++) {
		e = eng->exps[i];
		for (j = 0; j < e->ntests; j++) {
			if (e->tests[j].arm <= 0 || guardrail_index(conf,
			    old->guardrails[e->tests[j].g].name) >= 0)
				continue;
			finding_fill(eng, e, &e->tests[j], FINDING_RESTART, &f);
			f.reason = "guardrail removed";
			engine_emit(eng, &f);
		}
	}
	eng->conf = conf_dup(conf);
	for (i = 0; i < eng->nexps; i++) {
		e = eng->exps[i];
		if (e->fam_fixed)
			e->fam_mask = family_remap(old, eng->conf, e->fam_mask);
		if (e->closing != NULL && e->closing->fam_fixed)
			e->closing->fam_mask = family_remap(old, eng->conf,
			    e->closing->fam_mask);
		prev = xcalloc((size_t)e->ntests + 1, sizeof *prev);
		why = xcalloc((size_t)e->ntests + 1, sizeof *why);
		reconf_tests(eng, old, e, prev, why);
		nkept = e->ntests;
		reconf_metrics(eng, e);
		exp_settings(eng, e);
		if (e->closing != NULL) {
			reconf_tests(eng, old, e->closing, NULL, NULL);
			reconf_metrics(eng, e->closing);
			exp_settings(eng, e->closing);
			engine_link_tests(eng, e->closing);
		}
		exp_ensure_tests(eng, e);
		/* reported once the test reads the new configuration; a
		 * test of a variant no longer planned has nothing to say */
		for (j = 0; j < nkept; j++) {
			if (why[j] == NULL || e->tests[j].arm <= 0)
				continue;
			finding_fill(eng, e, &e->tests[j], FINDING_RESTART, &f);
			f.previous = prev[j];
			f.reason = why[j];
			engine_emit(eng, &f);
		}
		free(prev);
		free(why);
	}
	conf_free(old);
	(void)cause;
	return 0;
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
		    exp_find(eng, r->experiment))) {
			rc = ENGINE_E_UNTRUSTED;
			goto done;
		}
		rc = apply_plan(eng, r->arms, r->narms, r->experiment,
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
			closing_retire(eng, e);
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
		closing_retire(eng, eng->exps[i]);
		align_flush(eng, eng->exps[i]);
		srm_flush(eng, eng->exps[i]);
	}
	eng->force = 1;
	engine_tick(eng, now);
	eng->force = 0;
}

int
engine_plan(struct engine *eng, const char *id, const struct proto_arm *arms,
    int narms, double now, char **cause)
{
	int i, j;

	if (!proto_name_ok(id, strlen(id))) {
		xasprintf(cause, "bad experiment name");
		return -1;
	}
	if (narms < 2 || narms > PROTO_PLAN_MAX) {
		xasprintf(cause, "a plan needs 2 to %d arms", PROTO_PLAN_MAX);
		return -1;
	}
	for (i = 0; i < narms; i++) {
		if (!proto_name_ok(arms[i].name, strlen(arms[i].name)) ||
		    !(arms[i].weight > 0) || !isfinite(arms[i].weight)) {
			xasprintf(cause, "arm %d: bad variant name or weight",
			    i + 1);
			return -1;
		}
		for (j = 0; j < i; j++)
			if (strcmp(arms[i].name, arms[j].name) == 0) {
				xasprintf(cause, "variant %s appears twice",
				    arms[i].name);
				return -1;
			}
	}
	eng->now = now;
	switch (apply_plan(eng, arms, narms, id, NULL, now)) {
	case ENGINE_OK:
		return 0;
	case ENGINE_E_VARIANTS:
		xasprintf(cause, "more than %u arms", eng->conf->max_variants);
		return -1;
	case ENGINE_E_GUARDRAIL:
		xasprintf(cause, "its [experiment] guardrails name one not "
		    "configured");
		return -1;
	default:
		xasprintf(cause, "experiment cap (%u) reached",
		    eng->conf->max_experiments);
		return -1;
	}
}

static int
epoch_action(struct engine *eng, const char *id, double now, int forget,
    char **cause)
{
	struct experiment *e;

	if ((e = exp_find(eng, id)) == NULL) {
		xasprintf(cause, "no experiment %s", id);
		return -1;
	}
	eng->now = now;
	exp_new_epoch(eng, e, e->arms, e->narms, now, forget);
	return 0;
}

int
engine_new_epoch(struct engine *eng, const char *id, double now,
    char **cause)
{
	return epoch_action(eng, id, now, 0, cause);
}

int
engine_reset(struct engine *eng, const char *id, double now, char **cause)
{
	return epoch_action(eng, id, now, 1, cause);
}

/*
 * Retire an experiment: everything it holds is applied and looked at once
 * more (as at the end of a replay), its final view goes to the caller as
 * an archive, a FINDING_RETIRED says so, and it leaves the engine, so its
 * slot under max_experiments is free. The core writes nothing: the shell
 * stores the archive.
 */
int
engine_retire(struct engine *eng, const char *id, const char *why, double now,
    json_t **archive, char **cause)
{
	struct experiment *e;
	struct finding f;
	uint32_t slot;
	int j, force = eng->force;

	*archive = NULL;
	if (nmap_get(eng->index, id, strlen(id), &slot) != 0) {
		xasprintf(cause, "no experiment %s", id);
		return -1;
	}
	e = eng->exps[slot];
	eng->now = now;
	closing_retire(eng, e);
	align_flush(eng, e);
	srm_flush(eng, e);
	eng->force = 1;
	for (j = 0; j < e->ntests; j++)
		verdict_evaluate(eng, e, &e->tests[j], 1);
	eng->force = force;
	*archive = json_pack("{s:s, s:i, s:s, s:o, s:s, s:o}", "format",
	    "stopcock-archive", "version", 1, "experiment", e->id, "retired",
	    finding_num(now), "reason", why != NULL ? why : "operator",
	    "state", engine_json_experiment(eng, id));
	finding_fill_srm(eng, e, FINDING_RETIRED, &f);
	f.reason = why != NULL ? why : "operator";
	f.ts = now;
	engine_emit(eng, &f);

	/* the last experiment takes the freed slot */
	if (eng->recent == e)
		eng->recent = NULL;
	nmap_del(eng->index, id, strlen(id));
	engine_exp_free(e);
	eng->exps[slot] = eng->exps[--eng->nexps];
	if (eng->pool != NULL)
		eng->pool->used--;
	if (slot < eng->nexps)
		nmap_put(eng->index, eng->exps[slot]->id,
		    strlen(eng->exps[slot]->id), slot);
	eng->counters.experiments = eng->nexps;
	if (eng->cursor > eng->nexps)
		eng->cursor = 0;
	return 0;
}

/* The experiment that has seen no record for longest, if that is at least
 * idle seconds before now; NULL when none is. */
const char *
engine_idle(const struct engine *eng, double now, double idle)
{
	const struct experiment *e, *best = NULL;
	const struct conf_experiment *ce;
	uint32_t i;

	if (!(idle > 0))
		return NULL;
	for (i = 0; i < eng->nexps; i++) {
		e = eng->exps[i];
		if (isnan(e->touched) || now - e->touched < idle ||
		    (best != NULL && e->touched >= best->touched))
			continue;
		/* one planned in the configuration stays: it would only
		 * come back at the next start (looked up last: it is the
		 * dear test, and this runs on every tick) */
		if ((ce = conf_experiment_find(eng->conf, e->id)) != NULL &&
		    ce->narms >= 2)
			continue;
		best = e;
	}
	return best != NULL ? best->id : NULL;
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
	const struct experiment *e = exp_find(eng, id);

	if (e == NULL)
		return -1;
	foreach_exp(eng, e, cb, arg);
	return 0;
}
