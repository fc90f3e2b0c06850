/*
 * engine_exp.c: an experiment's life in the engine: its tests set up
 * from the guardrails that apply to it, its settings and SRM test, its
 * epochs (a changed plan or a reset starts one; the previous epoch
 * closes while its late records drain), plans, resets, retirement and
 * idleness. engine.c routes records to what this file creates.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_int.h"

static int
arm_find(const struct experiment *e, const char *name)
{
	int i;

	for (i = 0; i < e->narms; i++)
		if (strcmp(e->arms[i].name, name) == 0)
			return i;
	return -1;
}

static void
series_free(struct metric *m, int narms)
{
	int i;

	if (m->arm == NULL)
		return;
	for (i = 0; i < narms; i++) {
		sketch_free(m->arm[i].sk);
		engine_groups_free(m->arm[i].grp);
		free(m->arm[i].hq.q);
	}
	free(m->arm);
	m->arm = NULL;
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
		engine_groups_free(t->qg[i]);
		t->qg[i] = NULL;
		t->qx0[i] = NAN;
	}
}

void
engine_exp_test_init(struct test *t, int g, const char *variant)
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
int
engine_exp_applies(const struct experiment *e, int g)
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
void
engine_exp_ensure_tests(const struct engine *eng, struct experiment *e)
{
	int g, j, i, found;

	for (g = 0; g < eng->conf->nguardrails; g++) {
		if (!engine_exp_applies(e, g))
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
			engine_exp_test_init(&e->tests[e->ntests++], g, e->arms[j].name);
		}
	}
	engine_link_tests(eng, e);
}

void
engine_exp_settings(const struct engine *eng, struct experiment *e)
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
	engine_exp_settings(eng, e);
	exp_srm_start(eng, e);
	exp_push_epoch(e, now);
	engine_exp_ensure_tests(eng, e);
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
		engine_groups_free(e->tests[i].qg[0]);
		engine_groups_free(e->tests[i].qg[1]);
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
void
engine_exp_retire_closing(struct engine *eng, struct experiment *e)
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
		engine_exp_retire_closing(eng, e);
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
	engine_exp_settings(eng, e);
	exp_srm_start(eng, e);
	exp_push_epoch(e, now);
	engine_exp_ensure_tests(eng, e);
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
enum engine_reject
engine_exp_apply_plan(struct engine *eng, const struct proto_arm *arms,
    int narms, const char *id, const char *family, double now)
{
	const struct conf_experiment *ce;
	struct experiment *e;
	uint64_t mask = 0;
	int n = 0;

	if ((uint32_t)narms > eng->conf->max_variants)
		return ENGINE_E_VARIANTS;
	if ((e = engine_find(eng, id)) == NULL) {
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
	switch (engine_exp_apply_plan(eng, arms, narms, id, NULL, now)) {
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

	if ((e = engine_find(eng, id)) == NULL) {
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
	engine_exp_retire_closing(eng, e);
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
