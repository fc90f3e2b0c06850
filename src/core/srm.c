/*
 * srm.c: the SRM test in event time. Exposures wait in a ring of open
 * intervals until the watermark (the quorum's newest exposure time less
 * the lateness) passes an interval's end; each complete interval is
 * applied as one exact Dirichlet-multinomial batch. docs/methods.md
 * sec. 16.
 */
#include <math.h>

#include "engine_int.h"

/*
 * Apply every SRM interval that ends at or before the watermark, each as
 * one exact Dirichlet-multinomial batch (Lindon & Malek 2022): the Bayes
 * factor after a batch depends on its counts only, so the order in which
 * a complete interval's exposures arrived cannot move it, while the old
 * per-record path peaked inside a batch of one arm.
 */
static uint64_t *
srm_slot(const struct experiment *e, int64_t j)
{
	int64_t k = j % (int64_t)e->srm_slots;

	if (k < 0)
		k += e->srm_slots;
	return e->srm_ring + (size_t)k * (size_t)e->narms;
}

void
srm_complete(struct engine *eng, struct experiment *e, int64_t upto)
{
	double x[PROTO_PLAN_MAX];
	uint64_t *slot, total;
	int64_t end = upto;
	int i, applied = 0;

	/* beyond one turn of the ring every interval is empty: a jump in
	 * record time costs one turn, not one step per interval */
	if (end - e->srm_done > (int64_t)e->srm_slots)
		end = e->srm_done + (int64_t)e->srm_slots;
	for (; e->srm_done < end; e->srm_done++) {
		slot = srm_slot(e, e->srm_done);
		total = 0;
		for (i = 0; i < e->narms; i++) {
			x[i] = (double)slot[i];
			total += slot[i];
			slot[i] = 0;
		}
		if (total == 0)
			continue;
		e->srm_log_e += stats_dm_update(e->narms, e->srm_a, x,
		    e->theta0);
		applied = 1;
		if (e->srm_log_e > e->srm_max_log_e)
			e->srm_max_log_e = e->srm_log_e;
	}
	if (upto > e->srm_done)
		e->srm_done = upto;
	if (applied)
		verdict_srm(eng, e);
}

int64_t
srm_interval_of(const struct engine *eng, double t)
{
	double j = floor(t / eng->conf->srm_interval);

	return j < -9e18 ? INT64_MIN + 1 : j > 9e18 ? INT64_MAX - 1 :
	    (int64_t)j;
}

/* Keep the ENGINE_SRM_QUORUM largest exposure times, ascending. */
static void
srm_top_insert(struct experiment *e, double t)
{
	int i;

	if (e->srm_ntop < ENGINE_SRM_QUORUM)
		i = e->srm_ntop++;
	else if (t > e->srm_top[0])
		i = 0;
	else
		return;
	if (i == 0 && e->srm_ntop == ENGINE_SRM_QUORUM) {
		/* drop the smallest, sift t up */
		for (; i + 1 < ENGINE_SRM_QUORUM && e->srm_top[i + 1] < t; i++)
			e->srm_top[i] = e->srm_top[i + 1];
		e->srm_top[i] = t;
		return;
	}
	for (; i > 0 && e->srm_top[i - 1] > t; i--)
		e->srm_top[i] = e->srm_top[i - 1];
	e->srm_top[i] = t;
}

/*
 * An exposure at event time t. The watermark is the newest exposure time
 * less the allowed lateness (the producer's promise: no exposure arrives
 * later than that behind the newest one), where "newest" is the
 * ENGINE_SRM_QUORUM-th newest, so one exposure stamped far in the future
 * (a bad clock) cannot close every interval before its time. Exposures
 * stamped before the epoch began belong to the previous plan's split and
 * are late too; ones beyond the ring's headroom are counted as ahead.
 */
void
srm_expose(struct engine *eng, struct experiment *e, int arm,
    uint64_t units, double t)
{
	const struct epoch_info *ep = e->nepochs > 0 ?
	    &e->epochs[e->nepochs - 1] : NULL;
	int64_t j = srm_interval_of(eng, t);
	double newest;

	srm_top_insert(e, t);
	newest = e->srm_top[0];
	if (isnan(e->srm_newest)) {
		e->srm_newest = newest;
		e->srm_done = srm_interval_of(eng, newest -
		    eng->conf->lateness);
	} else if (newest > e->srm_newest) {
		e->srm_newest = newest;
		srm_complete(eng, e, srm_interval_of(eng, newest -
		    eng->conf->lateness));
	}
	if (j < e->srm_done || (ep != NULL && t < ep->started) ||
	    t < e->srm_floor) {
		e->srm_late[arm] += units;
		eng->counters.srm_late += units;
		return;
	}
	if (j >= e->srm_done + (int64_t)e->srm_slots) {
		e->srm_ahead[arm] += units;
		eng->counters.srm_late += units;
		return;
	}
	srm_slot(e, j)[arm] += units;
}

/* End of input: every open interval is complete. */
void
srm_flush(struct engine *eng, struct experiment *e)
{
	if (isnan(e->srm_newest))
		return;
	srm_complete(eng, e, srm_interval_of(eng, e->srm_newest) + 1);
}
