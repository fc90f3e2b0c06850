/*
 * finding.c: a finding is everything one alert, replay line, API entry or
 * metric needs about one test (a guardrail on a treatment arm, or an
 * experiment's SRM check). The engine fills one from its state whenever a
 * verdict changes or a view is asked for; finding_json is its one JSON
 * shape, shared by replay, webhooks, the API and the page.
 */
#include <math.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_int.h"

static void
finding_fill_arms(const struct engine *eng, const struct experiment *e,
    const struct test *t, const struct metric *m, struct finding *f)
{
	const struct conf_guardrail *g = t ? &eng->conf->guardrails[t->g] :
	    NULL;
	const struct series *s;
	struct finding_arm *fa;
	int i;

	f->narms = e->narms;
	for (i = 0; i < e->narms; i++) {
		fa = &f->arms[i];
		fa->variant = e->arms[i].name;
		fa->weight = e->arms[i].weight;
		fa->exposures = e->exposures[i];
		fa->n = fa->k = fa->value = NAN;
		fa->lower = fa->upper = NAN;
		if (m == NULL || m->arm == NULL)
			continue;
		s = &m->arm[i];
		if (m->kind == METRIC_OBSERVE) {
			fa->n = (double)s->m.n;
			fa->value = s->m.n ? s->m.mean : NAN;
			if (g && g->test == TEST_QUANTILE && s->sk)
				fa->value = sketch_quantile(s->sk, g->quantile);
		} else if (m->kind == METRIC_COUNT) {
			fa->n = (double)s->r.n;
			fa->k = (double)s->r.k;
			fa->value = tally_ratio_rate(&s->r);
		}
		if (g && g->test == TEST_QUANTILE && t) {
			if (i == 0) {
				fa->lower = t->ctl_lo;
				fa->upper = t->ctl_hi;
			} else if (i == t->arm) {
				fa->lower = t->trt_lo;
				fa->upper = t->trt_hi;
			}
		}
	}
}

void
finding_fill(const struct engine *eng, const struct experiment *e,
    const struct test *t, enum finding_kind kind, struct finding *f)
{
	const struct conf_guardrail *g = &eng->conf->guardrails[t->g];
	int i;

	memset(f, 0, sizeof *f);
	f->kind = kind;
	f->experiment = e->id;
	f->epoch = e->epoch;
	f->guardrail = g->name;
	f->metric = g->metric;
	f->test = conf_test_name(g->test);
	f->test_kind = g->test;
	f->quantile = g->test == TEST_QUANTILE ? g->quantile : 0;
	f->variant = t->variant;
	f->control = e->arms[0].name;
	f->harm = g->harm == HARM_INCREASE ? "increase" : "decrease";
	f->verdict = t->verdict;
	f->previous = t->verdict;
	f->action_pause = g->action == ACTION_PAUSE;
	f->p = stats_p_from_log_e(t->max_log_e);
	f->log_e = t->closed_log_e + t->log_e;
	f->alpha = verdict_level(e);
	f->alpha_total = e->alpha;
	f->pause_level = verdict_pause_level(eng, e);
	f->family = e->family;
	f->estimate = t->est;
	f->lower = t->cs_lo;
	f->upper = t->cs_hi;
	f->rel_estimate = t->rel;
	f->rel_lower = t->rel_lo;
	f->rel_upper = t->rel_hi;
	f->margin = t->margin_abs;
	f->chi2_p = NAN;
	f->sketch_accuracy = g->test == TEST_QUANTILE ?
	    eng->conf->sketch_accuracy : NAN;
	f->design_effect = t->deff > 0 ? t->deff : NAN;
	f->detect_log_m = t->det_on ? t->det_log_m : NAN;
	f->detect_threshold = g->test == TEST_QUANTILE ? NAN :
	    change_threshold(eng, e);
	f->change_start = t->det_alarm ? t->det_start : NAN;
	f->by_detector = t->verdict == VERDICT_HARM && t->by_detector;
	f->covers_from = e->nepochs > 0 ? e->epochs[e->nepochs - 1].started :
	    NAN;
	f->covers_to = eng->now;
	f->recent_threshold = g->test == TEST_QUANTILE ? t->qd_x0 : NAN;
	for (i = 0; i < 2; i++) {
		f->recent[i] = f->recent_since[i] = NAN;
		f->recent_records[i][0] = f->recent_records[i][1] = NAN;
		if (t->metric >= 0 && t->arm > 0 &&
		    e->metrics[t->metric].arm != NULL)
			f->recent[i] = change_window_estimate(eng, t, g,
			    &e->metrics[t->metric].arm[0],
			    &e->metrics[t->metric].arm[t->arm], i,
			    &f->recent_since[i], f->recent_records[i]);
	}
	f->untrusted = e->srm_fired;
	f->untrusted_records = e->untrusted_records;
	f->ts = eng->now;
	f->first_ts = t->first_ts;
	f->event = t->first_event ? t->first_event : eng->event;
	finding_fill_arms(eng, e, t, t->metric >= 0 ? &e->metrics[t->metric] : NULL,
	    f);
}

void
finding_fill_srm(const struct engine *eng, const struct experiment *e,
    enum finding_kind kind, struct finding *f)
{
	double counts[PROTO_PLAN_MAX], x2;
	int i;

	memset(f, 0, sizeof *f);
	f->kind = kind;
	f->experiment = e->id;
	f->epoch = e->epoch;
	f->guardrail = "srm";
	f->test = "srm";
	f->control = e->arms[0].name;
	f->harm = "mismatch";
	f->verdict = e->srm_fired ? VERDICT_HARM : VERDICT_UNDECIDED;
	f->previous = VERDICT_UNDECIDED;
	f->p = stats_p_from_log_e(e->srm_max_log_e);
	f->log_e = e->srm_log_e;
	f->alpha = e->srm_alpha;
	f->alpha_total = e->srm_alpha;
	f->pause_level = e->srm_alpha;	/* pause_on_srm pauses at the SRM level */
	f->family = 1;
	f->estimate = f->lower = f->upper = NAN;
	f->rel_estimate = f->rel_lower = f->rel_upper = NAN;
	f->margin = NAN;
	f->sketch_accuracy = NAN;
	f->design_effect = NAN;
	f->detect_log_m = f->detect_threshold = f->change_start = NAN;
	f->covers_from = e->nepochs > 0 ? e->epochs[e->nepochs - 1].started :
	    NAN;
	f->covers_to = eng->now;
	f->recent_threshold = NAN;
	for (i = 0; i < 2; i++)
		f->recent[i] = f->recent_since[i] = f->recent_records[i][0] =
		    f->recent_records[i][1] = NAN;
	for (i = 0; i < e->narms; i++)
		counts[i] = (double)e->exposures[i];
	/* The classic chi-square, shown as a one-look figure only. */
	f->chi2_p = stats_srm_chi2(e->narms, counts, e->theta0, &x2);
	f->untrusted = e->srm_fired;
	f->untrusted_records = e->untrusted_records;
	f->ts = eng->now;
	f->first_ts = e->srm_first_ts;
	f->event = e->srm_first_event ? e->srm_first_event : eng->event;
	finding_fill_arms(eng, e, NULL, NULL, f);
}

/* ---- JSON ---- */

/* Views write non-finite numbers as null. */
json_t *
finding_num(double x)
{
	return isfinite(x) ? json_real(x) : json_null();
}

static const char *
finding_kind_name(enum finding_kind k)
{
	switch (k) {
	case FINDING_VERDICT:
		return "verdict";
	case FINDING_SRM:
		return "srm";
	case FINDING_UNTRUSTED:
		return "untrusted";
	case FINDING_PAUSE:
		return "pause";
	case FINDING_EPOCH:
		return "epoch";
	case FINDING_RESTART:
		return "restart";
	case FINDING_RETIRED:
		return "retired";
	}
	return "unknown";
}

static json_t *
arms_json(const struct finding *f)
{
	json_t *a = json_array(), *o;
	int i;

	for (i = 0; i < f->narms; i++) {
		const struct finding_arm *fa = &f->arms[i];
		o = json_pack("{s:s, s:o, s:I}", "variant", fa->variant,
		    "weight", finding_num(fa->weight), "exposures",
		    (json_int_t)fa->exposures);
		json_object_set_new(o, "n", finding_num(fa->n));
		json_object_set_new(o, "k", finding_num(fa->k));
		json_object_set_new(o, "value", finding_num(fa->value));
		json_object_set_new(o, "lower", finding_num(fa->lower));
		json_object_set_new(o, "upper", finding_num(fa->upper));
		json_array_append_new(a, o);
	}
	return a;
}

static void
set_str(json_t *o, const char *k, const char *v)
{
	json_object_set_new(o, k, v ? json_string(v) : json_null());
}

json_t *
finding_json(const struct finding *f)
{
	json_t *o = json_object();

	set_str(o, "kind", finding_kind_name(f->kind));
	set_str(o, "experiment", f->experiment);
	json_object_set_new(o, "epoch", json_integer(f->epoch));
	set_str(o, "guardrail", f->guardrail);
	set_str(o, "metric", f->metric);
	set_str(o, "test", f->test);
	json_object_set_new(o, "quantile", f->quantile > 0 ?
	    json_real(f->quantile) : json_null());
	set_str(o, "variant", f->variant);
	set_str(o, "control", f->control);
	set_str(o, "harm", f->harm);
	set_str(o, "action", f->action_pause ? "pause" : "alert");
	set_str(o, "verdict", verdict_name(f->verdict));
	set_str(o, "previous", verdict_name(f->previous));
	json_object_set_new(o, "p", finding_num(f->p));
	json_object_set_new(o, "log_e", finding_num(f->log_e));
	json_object_set_new(o, "alpha", finding_num(f->alpha));
	json_object_set_new(o, "alpha_total", finding_num(f->alpha_total));
	json_object_set_new(o, "family", json_integer(f->family));
	json_object_set_new(o, "estimate", finding_num(f->estimate));
	json_object_set_new(o, "lower", finding_num(f->lower));
	json_object_set_new(o, "upper", finding_num(f->upper));
	json_object_set_new(o, "rel_estimate", finding_num(f->rel_estimate));
	json_object_set_new(o, "rel_lower", finding_num(f->rel_lower));
	json_object_set_new(o, "rel_upper", finding_num(f->rel_upper));
	json_object_set_new(o, "margin", finding_num(f->margin));
	json_object_set_new(o, "chi2_p", finding_num(f->chi2_p));
	json_object_set_new(o, "sketch_accuracy", finding_num(f->sketch_accuracy));
	json_object_set_new(o, "design_effect", finding_num(f->design_effect));
	json_object_set_new(o, "raised_by", f->kind == FINDING_VERDICT &&
	    f->verdict == VERDICT_HARM ? json_string(f->by_detector ?
	    "change_detector" : "running_test") : json_null());
	json_object_set_new(o, "detector", json_pack("{s:o, s:o, s:o}",
	    "log_m", finding_num(f->detect_log_m), "threshold",
	    finding_num(f->detect_threshold), "change_start",
	    finding_num(f->change_start)));
	json_object_set_new(o, "covers", json_pack("{s:o, s:o}", "from",
	    finding_num(f->covers_from), "to", finding_num(f->covers_to)));
	if (f->kind == FINDING_VERDICT) {
		json_t *w = json_array();
		int i;
		for (i = 0; i < 2; i++)
			json_array_append_new(w, json_pack("{s:o, s:o, s:o, "
			    "s:[o, o]}", "span", finding_num(
			    change_window_span(i)), "since", finding_num(
			    f->recent_since[i]), "estimate", finding_num(
			    f->recent[i]), "records", finding_num(
			    f->recent_records[i][0]), finding_num(
			    f->recent_records[i][1])));
		json_object_set_new(o, "recent", w);
		/* what a window's estimate measures: a quantile's windows
		 * compare the shares beyond one threshold */
		json_object_set_new(o, "recent_measure", json_string(
		    f->test_kind == TEST_QUANTILE ? "share_beyond" :
		    "difference"));
		json_object_set_new(o, "recent_threshold",
		    finding_num(f->recent_threshold));
	}
	json_object_set_new(o, "untrusted", json_boolean(f->untrusted));
	json_object_set_new(o, "untrusted_records",
	    json_integer((json_int_t)f->untrusted_records));
	json_object_set_new(o, "ts", finding_num(f->ts));
	json_object_set_new(o, "first_ts", finding_num(f->first_ts));
	json_object_set_new(o, "event", json_integer((json_int_t)f->event));
	if (f->reason != NULL)
		set_str(o, "reason", f->reason);
	json_object_set_new(o, "arms", arms_json(f));
	return o;
}

