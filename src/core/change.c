/*
 * change.c: change detection beside each guardrail's running test. The
 * running test weighs the whole epoch, so after a long healthy stretch a
 * new harm is diluted by the past and found late (its delay grows with the
 * square root of the history). Here every test (a quantile through the
 * share of values beyond a frozen threshold) also cuts its data into blocks, turns each block into one-sided harm
 * evidence (score X = d / V, information I = 1 / V, with d the block's
 * excess beyond the margin in the harmful direction) and feeds an
 * e-detector: a mixture over excess sizes of Page's CUSUM (Page 1954;
 * Shin, Ramdas & Rinaldo 2023), whose delay after a change does not grow
 * with the healthy history. It runs whatever the verdict: "safe" speaks of
 * the past.
 *
 * Blocks are cut from the cumulative tallies the test already keeps
 * (a snapshot per arm at the block's start), so the detector costs a few
 * numbers per test and nothing per record beyond a comparison. A block
 * closes once both arms have ENGINE_BLOCK_RECORDS new records (for
 * proportions, ENGINE_EVENTS_MIN expected events) and at least
 * ENGINE_BLOCK_SECONDS of record time has passed, so there is at most one
 * block per second and an average run length of c blocks is at least c
 * seconds. The block variance uses the epoch's per-record variance (with
 * its unit-level design effect): the same variance the test uses.
 *
 * False-alarm control is an average run length, not an alpha: with
 * detect_arl = A (seconds of record time between false alarms, per
 * experiment) and K series in the experiment, each detector alarms at
 * log M >= log(K A / ENGINE_BLOCK_SECONDS) (the average of K e-detectors
 * is one). docs/methods.md, "change detection".
 */
#include <math.h>
#include <string.h>

#include "engine_int.h"

/* cumulative (records, numerator, denominator) of one arm */
static void
change_cum(const struct conf_guardrail *g, const struct series *sr,
    double out[3])
{
	if (g->test == TEST_MEAN) {
		out[0] = (double)sr->m.n;
		out[1] = sr->m.mean * (double)sr->m.n;
		out[2] = (double)sr->m.n;
	} else {
		out[0] = (double)sr->r.records;
		out[1] = (double)sr->r.k;
		out[2] = (double)sr->r.n;
	}
}

void
change_reset(struct test *t)
{
	memset(&t->det, 0, sizeof t->det);
	t->det_on = 0;
	t->det_alarm = 0;
	t->det_log_m = -INFINITY;
	t->det_start = NAN;
	t->blk_ts = NAN;
	memset(t->snap, 0, sizeof t->snap);
	memset(t->win, 0, sizeof t->win);
}

double
change_threshold(const struct engine *eng, const struct experiment *e)
{
	return stats_detect_threshold(eng->conf->detect_arl /
	    ENGINE_BLOCK_SECONDS, e->family > 0 ? e->family : 1);
}

/*
 * One look's cumulative (records, numerator, denominator) per arm, a the
 * control and b the treatment; prop: the numerator counts events among
 * trials (variances are per trial), else values per record. s is +1 when
 * a larger treatment numerator is harmful. Returns 1 when the detector
 * crossed its threshold on a block closed now.
 */
static int
change_block(const struct engine *eng, const struct experiment *e,
    struct test *t, const struct conf_guardrail *g, int prop,
    const double ca[3], const double cb[3], double sig2_t, double sig2_c,
    double k, double m, double s)
{
	double dn_a, dn_b, dr_a, dr_b, va, vb, V, d;
	double need = ENGINE_BLOCK_RECORDS, lo, hi, start;

	if (isnan(t->blk_ts)) {
		/* the first block starts at the first look */
		t->blk_ts = eng->now;
		memcpy(t->snap[0], ca, 3 * sizeof *ca);
		memcpy(t->snap[1], cb, 3 * sizeof *cb);
		return 0;
	}
	dr_a = ca[0] - t->snap[0][0];
	dr_b = cb[0] - t->snap[1][0];
	if (dr_a < need || dr_b < need ||
	    eng->now - t->blk_ts < ENGINE_BLOCK_SECONDS)
		return 0;
	dn_a = ca[2] - t->snap[0][2];
	dn_b = cb[2] - t->snap[1][2];
	if (!(dn_a > 0) || !(dn_b > 0))
		return 0;
	if (prop) {
		double pool = (ca[1] + cb[1]) / (ca[2] + cb[2]);
		if (fmin(dn_a, dn_b) * fmin(pool, 1 - pool) <
		    ENGINE_EVENTS_MIN)
			return 0;
		/* per trial: the block's variance scales with its trials */
		va = sig2_c / dn_a;
		vb = sig2_t / dn_b;
	} else {
		va = sig2_c / dr_a;
		vb = sig2_t / dr_b;
	}
	d = s * ((cb[1] - t->snap[1][1]) / dn_b - k * (ca[1] -
	    t->snap[0][1]) / dn_a) - m;
	V = vb + k * k * va;
	memcpy(t->snap[0], ca, 3 * sizeof *ca);
	memcpy(t->snap[1], cb, 3 * sizeof *cb);
	start = t->blk_ts;
	t->blk_ts = eng->now;
	if (!(V > 0) || !isfinite(V) || !isfinite(d))
		return 0;
	if (!t->det_on) {
		/*
		 * The grid of excesses, fixed from data before the first
		 * block: from an excess the plan's horizon could just see to
		 * one a single block shows at a glance.
		 */
		double sd = sqrt(V * fmin(dr_a, dr_b));
		lo = sd / sqrt(fmax(plan_units_of(g, e), 4 * need));
		hi = 4 * sd / sqrt(need);
		/* a grid that cannot be built leaves the detector off */
		if (stats_detect_init(&t->det, lo, hi, STATS_DETECT_GRID) != 0)
			return 0;
		t->det_on = 1;
	}
	/* a run's start is the start of its first block */
	t->det_log_m = stats_detect_update(&t->det, d / V, 1 / V, start);
	if (t->det_alarm || t->det_log_m < change_threshold(eng, e))
		return 0;
	t->det_alarm = 1;
	t->det_start = stats_detect_change_start(&t->det);
	return 1;
}

/*
 * Offer a mean, proportion or rate test's current tallies. sig2_t and
 * sig2_c are the per-record variances of each arm (mean: of a value;
 * proportion: of a trial, times the design effect, per trial; rate: of a
 * record's ratio), k the relative margin's factor on the control, m the
 * absolute margin.
 */
int
change_offer(const struct engine *eng, const struct experiment *e,
    struct test *t, const struct conf_guardrail *g, const struct series *a,
    const struct series *b, double sig2_t, double sig2_c, double k,
    double m)
{
	double ca[3], cb[3];

	change_cum(g, a, ca);
	change_cum(g, b, cb);
	return change_block(eng, e, t, g, g->test == TEST_PROPORTION, ca, cb,
	    sig2_t, sig2_c, k, m, g->harm == HARM_INCREASE ? 1 : -1);
}

/*
 * Quantile guardrails. A harmful shift of the treatment's q-quantile
 * beyond the margin raises the share of its values beyond the control's
 * quantile x0 (moved by the margin), so the detector watches that share:
 * blocks of exceedance counts are proportions, tested as above with the
 * pooled binomial variance times the design effect (1 / weight). x0 is
 * frozen once, so the indicator is the same in every block; the counts
 * come from the sketches' cumulative buckets (verdict.c), nothing is kept
 * per record. ea and eb are the cumulative exceedances, na and nb the
 * records.
 */
int
change_offer_quantile(const struct engine *eng, const struct experiment *e,
    struct test *t, const struct conf_guardrail *g, double na, double ea,
    double nb, double eb, double deff)
{
	double ca[3] = { na, ea, na }, cb[3] = { nb, eb, nb };
	double pool = (ea + eb) / (na + nb), sig2;

	if (!(na > 0) || !(nb > 0))
		return 0;
	sig2 = pool * (1 - pool) * fmax(1, deff);
	return change_block(eng, e, t, g, 1, ca, cb, sig2, sig2, 1, 0, 1);
}

/*
 * Windowed views: the effect on recent record time beside the epoch's.
 * Snapshots of the cumulative tallies are kept every span / WIN_SLOTS of
 * record time per window; a window's estimate is the difference between
 * now and its oldest snapshot still inside the span.
 */
static const double change_spans[CHANGE_WINDOWS] = { 3600, 86400 };

double
change_window_span(int i)
{
	return i >= 0 && i < CHANGE_WINDOWS ? change_spans[i] : NAN;
}

/*
 * A window's cumulative tallies: the arms' own, or for a quantile the
 * last look's counts beyond the detector's threshold (so its windowed
 * view is the change in the share of values beyond it). -1 before a
 * quantile's threshold is frozen.
 */
static int
window_cum(const struct test *t, const struct conf_guardrail *g,
    const struct series *a, const struct series *b, double ca[3],
    double cb[3])
{
	if (g->test == TEST_QUANTILE) {
		if (isnan(t->qd_x0) || !(t->qd_cum[0][0] > 0))
			return -1;
		memcpy(ca, t->qd_cum[0], 3 * sizeof *ca);
		memcpy(cb, t->qd_cum[1], 3 * sizeof *cb);
		return 0;
	}
	change_cum(g, a, ca);
	change_cum(g, b, cb);
	return 0;
}

void
change_window_offer(const struct engine *eng, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b)
{
	struct change_window *w;
	double step, ca[3], cb[3];
	int i, k;

	if (window_cum(t, g, a, b, ca, cb) != 0)
		return;
	for (i = 0; i < CHANGE_WINDOWS; i++) {
		w = &t->win[i];
		step = change_spans[i] / CHANGE_WIN_SLOTS;
		if (w->n > 0 && eng->now < w->ts[(w->head + w->n - 1) %
		    CHANGE_WIN_SLOTS] + step)
			continue;
		if (w->n == CHANGE_WIN_SLOTS) {
			w->head = (w->head + 1) % CHANGE_WIN_SLOTS;
			w->n--;
		}
		k = (w->head + w->n) % CHANGE_WIN_SLOTS;
		w->ts[k] = eng->now;
		memcpy(w->snap[k][0], ca, sizeof ca);
		memcpy(w->snap[k][1], cb, sizeof cb);
		w->n++;
	}
}

/* The effect over window i: treatment minus control over the records
 * since the oldest snapshot inside the span (a quantile: the difference
 * of the shares beyond its threshold). NAN without data. */
double
change_window_estimate(const struct engine *eng, const struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b, int i, double *since, double rec[2])
{
	const struct change_window *w = &t->win[i];
	double ca[3], cb[3];
	int j, k = 0;

	*since = NAN;
	rec[0] = rec[1] = 0;
	if (w->n == 0 || window_cum(t, g, a, b, ca, cb) != 0)
		return NAN;
	for (j = 0; j < w->n; j++) {
		k = (w->head + j) % CHANGE_WIN_SLOTS;
		if (w->ts[k] >= eng->now - change_spans[i])
			break;
	}
	if (j == w->n)
		return NAN;
	*since = w->ts[k];
	rec[0] = ca[0] - w->snap[k][0][0];
	rec[1] = cb[0] - w->snap[k][1][0];
	if (!(ca[2] - w->snap[k][0][2] > 0) || !(cb[2] - w->snap[k][1][2] > 0))
		return NAN;
	return (cb[1] - w->snap[k][1][1]) / (cb[2] - w->snap[k][1][2]) -
	    (ca[1] - w->snap[k][0][1]) / (ca[2] - w->snap[k][0][2]);
}
