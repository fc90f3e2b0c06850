/*
 * align.c: event time for metric records. Each arm's records of a metric
 * wait in a queue until the metric's watermark (the oldest of the arms'
 * newest record times, never more than the lateness behind the newest)
 * passes them; then they are applied oldest first across the arms
 * (engine_fold), so the arms are compared on data complete for all of
 * them. docs/methods.md sec. 16.
 */
#include <math.h>
#include <stdlib.h>

#include "stopcock/util.h"
#include "engine_int.h"

void
align_push(struct experiment *e, struct series *s, const struct held *r)
{
	struct heldq *q = &s->hq;
	uint32_t i, cap;
	struct held *nq;

	if (q->n == q->cap) {
		cap = q->cap ? q->cap * 2 : 16;
		nq = xreallocarray(NULL, cap, sizeof *nq);
		for (i = 0; i < q->n; i++)
			nq[i] = q->q[(q->head + i) & (q->cap - 1)];
		free(q->q);
		q->q = nq;
		q->cap = cap;
		q->head = 0;
	}
	/* cap is a power of two: 16, then doubled */
	q->q[(q->head + q->n) & (q->cap - 1)] = *r;
	q->n++;
	e->held++;
}

/*
 * Apply the held records of metric mi with event time at or before w,
 * oldest first across the arms, so each look between two of them sees
 * the arms up to about the same time.
 */
static void
align_drain(struct engine *eng, struct experiment *e, int mi, double w)
{
	struct metric *m = &e->metrics[mi];
	struct heldq *q;
	struct held r;
	int i, best;

	if (m->arm == NULL)
		return;
	/*
	 * A drain of everything (a silent metric, end of input) applies what
	 * is held but moves the watermark only to the newest record seen:
	 * records that come later are still on time, not late.
	 */
	if (!isfinite(w)) {
		double top = -INFINITY;
		for (i = 0; i < e->narms; i++)
			if (m->arm[i].hq.latest > top)
				top = m->arm[i].hq.latest;
		if (top > m->wm)
			m->wm = top;
	} else if (w > m->wm)
		m->wm = w;
	for (;;) {
		best = -1;
		for (i = 0; i < e->narms; i++) {
			q = &m->arm[i].hq;
			if (q->n > 0 && q->q[q->head].t <= w && (best < 0 ||
			    q->q[q->head].t <
			    m->arm[best].hq.q[m->arm[best].hq.head].t))
				best = i;
		}
		if (best < 0)
			return;
		q = &m->arm[best].hq;
		r = q->q[q->head];
		q->head = (q->head + 1) & (q->cap - 1);
		q->n--;
		e->held--;
		engine_fold(eng, e, mi, best, &r);
	}
}

/*
 * The watermark of a metric: the oldest of its arms' newest record times
 * (an arm whose records are delivered late holds the others back), but
 * never more than the allowed lateness behind the newest, so a silent or
 * sparse arm cannot hold the rest for ever. A producer promises that a
 * record arrives no later than that (the same promise as for exposures).
 */
static double
align_watermark(const struct engine *eng, const struct experiment *e,
    const struct metric *m)
{
	double lo = INFINITY, hi = -INFINITY, t;
	int i;

	for (i = 0; i < e->narms; i++) {
		t = m->arm[i].hq.latest;
		if (t < lo)
			lo = t;
		if (t > hi)
			hi = t;
	}
	t = hi - eng->conf->lateness;
	return lo > t ? lo : t;
}

static int
align_none_held(const struct experiment *e, const struct metric *m)
{
	int i;

	for (i = 0; i < e->narms; i++)
		if (m->arm[i].hq.n > 0)
			return 0;
	return 1;
}

/*
 * A metric record at event time t. One behind the watermark (later than
 * the producer promised) is applied at once and counted, never dropped;
 * the rest wait in their arm's queue until every arm has reached their
 * time. Past ENGINE_HELD_MAX held records in the experiment the oldest
 * of this metric are applied early, and counted.
 */
void
align_offer(struct engine *eng, struct experiment *e, int mi, int arm,
    const struct held *r, int stamped)
{
	struct metric *m = &e->metrics[mi];
	struct series *s = &m->arm[arm];
	double w;

	m->arrived = eng->now;
	if (stamped)
		m->stamped = 1;
	if (r->t < m->wm) {
		eng->counters.metric_late++;
		engine_fold(eng, e, mi, arm, r);
		return;
	}
	if (r->t > s->hq.latest)
		s->hq.latest = r->t;
	/* nothing of this metric waits and every arm has reached t: the
	 * usual case for the arm whose records come last */
	if (align_none_held(e, m) && r->t <= (w = align_watermark(eng, e,
	    m))) {
		if (w > m->wm)
			m->wm = w;
		engine_fold(eng, e, mi, arm, r);
		return;
	}
	while (e->held >= ENGINE_HELD_MAX) {
		double oldest = INFINITY;
		int i;
		for (i = 0; i < e->narms; i++)
			if (m->arm[i].hq.n > 0 && m->arm[i].hq.q[
			    m->arm[i].hq.head].t < oldest)
				oldest = m->arm[i].hq.q[m->arm[i].hq.head].t;
		eng->counters.held_forced++;
		if (oldest == INFINITY) {
			engine_fold(eng, e, mi, arm, r);
			return;
		}
		align_drain(eng, e, mi, oldest);
	}
	align_push(e, s, r);
	align_drain(eng, e, mi, align_watermark(eng, e, m));
}

/*
 * On a tick: records stamped on arrival come in time order, so once the
 * clock is the lateness past them nothing can still arrive before them;
 * and a metric silent for the lateness has nothing more in flight.
 */
void
align_tick(struct engine *eng, struct experiment *e, double now)
{
	int i;

	if (e->held == 0)
		return;
	for (i = 0; i < e->nmetrics; i++) {
		struct metric *m = &e->metrics[i];
		if (now - m->arrived > eng->conf->lateness)
			align_drain(eng, e, i, INFINITY);
		else if (!m->stamped)
			align_drain(eng, e, i, now - eng->conf->lateness);
	}
}

/* End of input or of the epoch: every held record is applied. */
void
align_flush(struct engine *eng, struct experiment *e)
{
	int i;

	for (i = 0; e->held > 0 && i < e->nmetrics; i++)
		align_drain(eng, e, i, INFINITY);
}
