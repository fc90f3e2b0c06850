/*
 * webhook_spool.c: a receiver's queue of deliveries. Each delivery is
 * written durably to <state_dir>/spool/<receiver>/<seq>.json before it
 * is first attempted and unlinked once settled, so an outage or a
 * restart loses nothing; at start the files are read back in seq order.
 * The queue is bounded by entries and by bytes; when it is full the
 * oldest info alert is dropped (logged, counted), and anything more
 * severe is kept beyond the bound (counted as overfull) rather than lost.
 */
#include <sys/stat.h>
#include <sys/types.h>

#include <dirent.h>
#include <errno.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <jansson.h>

#include "stopcock/log.h"
#include "webhook_int.h"

/* The delivery is settled (sent, failed or dropped): forget its spool. */
void
webhook_spool_forget(struct delivery *dl)
{
	if (dl->path != NULL && unlink(dl->path) == -1 && errno != ENOENT)
		log_warn("webhook: unlink %s", dl->path);
}

/* The delivery's spool file, written durably before any attempt. */
static int
webhook_spool_write(struct receiver *r, struct delivery *dl)
{
	json_t *j;
	char *text, *path, *cause = NULL;
	const char *parts[1];
	size_t lens[1];

	j = json_pack("{s:s, s:s%, s:s, s:I, s:b}", "id", dl->id, "body",
	    dl->body, dl->len, "receiver", r->name, "seq", (json_int_t)dl->seq,
	    "info", dl->info);
	if (j == NULL)
		return -1;
	text = json_dumps(j, JSON_COMPACT);
	json_decref(j);
	if (text == NULL)
		return -1;
	xasprintf(&path, "%s/%016" PRIx64 ".json", r->spool, dl->seq);
	parts[0] = text;
	lens[0] = strlen(text);
	if (durable_write(r->spool, path, parts, lens, 1, 0600, &cause) != 0) {
		log_warnx("webhook: spool: %s", cause);
		free(cause);
		free(text);
		free(path);
		return -1;
	}
	free(text);
	dl->path = path;
	return 0;
}

static int
webhook_spool_full(const struct receiver *r, const struct delivery *dl)
{
	return r->nwaiting + r->ninflight >= r->queue_max ||
	    r->spool_used + dl->len > r->spool_max;
}

/*
 * Room for the new delivery dl (not yet queued): drop the oldest waiting
 * info alerts while the spool is full. With none left, a new info alert
 * is itself dropped (-1); anything else is kept beyond the bound, since
 * losing a harm, SRM or pause alert is worse than a fuller disk.
 */
static int
webhook_spool_room(struct receiver *r, struct delivery *dl)
{
	struct delivery *old;

	while (webhook_spool_full(r, dl)) {
		TAILQ_FOREACH(old, &r->waiting, entry)
			if (old->info)
				break;
		if (old != NULL) {
			TAILQ_REMOVE(&r->waiting, old, entry);
			r->nwaiting--;
		} else {
			/* An attempt under way is cancelled with its handle. */
			TAILQ_FOREACH(old, &r->inflight, entry)
				if (old->info)
					break;
			if (old == NULL)
				break;
			TAILQ_REMOVE(&r->inflight, old, entry);
			r->ninflight--;
		}
		r->dropped++;
		log_warnx("webhook: spool full, dropped oldest info alert "
		    "receiver=%s id=%s queue=%u bytes=%" PRIu64, r->name,
		    old->id, r->nwaiting + r->ninflight, r->spool_used);
		webhook_spool_forget(old);
		webhook_delivery_free(old);
	}
	if (!webhook_spool_full(r, dl))
		return 0;
	if (dl->info) {
		r->dropped++;
		log_warnx("webhook: spool full, dropped new info alert "
		    "receiver=%s id=%s", r->name, dl->id);
		return -1;
	}
	r->overfull++;
	log_warnx("webhook: spool full, kept beyond the bound receiver=%s "
	    "id=%s queue=%u bytes=%" PRIu64, r->name, dl->id,
	    r->nwaiting + r->ninflight, r->spool_used);
	return 0;
}

/* Insert by seq so spool loading and re-queued retries keep the order. */
void
webhook_spool_insert(struct receiver *r, struct delivery *dl)
{
	struct delivery *at;

	TAILQ_FOREACH(at, &r->waiting, entry)
		if (at->seq > dl->seq)
			break;
	if (at != NULL)
		TAILQ_INSERT_BEFORE(at, dl, entry);
	else
		TAILQ_INSERT_TAIL(&r->waiting, dl, entry);
	r->nwaiting++;
}

/* The experiment a body (an alert or a pause) is about, or NULL. */
static char *
webhook_spool_experiment(const char *body, size_t len)
{
	json_t *j = json_loadb(body, len, 0, NULL);
	const char *e = json_string_value(json_object_get(j, "experiment"));
	char *out = e != NULL ? xstrdup(e) : NULL;

	json_decref(j);
	return out;
}

void
webhook_spool_queue(struct receiver *r, const char *id, const char *body,
    size_t len, int info)
{
	struct delivery *dl;

	dl = xcalloc(1, sizeof *dl);
	dl->rcv = r;
	dl->seq = r->w->seq++;
	dl->id = xstrdup(id);
	dl->experiment = webhook_spool_experiment(body, len);
	dl->body = xmalloc(len + 1);
	memcpy(dl->body, body, len);
	dl->body[len] = '\0';
	dl->len = len;
	dl->info = info;
	if (webhook_spool_room(r, dl) == -1) {
		dl->len = 0;	/* never counted in spool_used */
		webhook_delivery_free(dl);
		return;
	}
	r->spool_used += len;
	if (r->spool != NULL && webhook_spool_write(r, dl) == -1)
		r->spool_errors++;
	webhook_spool_insert(r, dl);
	webhook_kick(r);
}

/* Read one spool file back; a damaged file is kept aside, not lost. */
static void
webhook_spool_load_one(struct receiver *r, const char *path, uint64_t seq)
{
	struct delivery *dl;
	json_error_t err;
	json_t *j;
	const char *id = NULL, *body = NULL;
	size_t len = 0;
	int info = 0;
	char *bad;

	/* "info" is absent from files written before the spool had a
	 * bound: such an entry is kept like a harm alert. */
	j = json_load_file(path, 0, &err);
	if (j == NULL || json_unpack(j, "{s:s, s:s%, s?b}", "id", &id, "body",
	    &body, &len, "info", &info) == -1 || strlen(id) == 0 ||
	    strlen(id) > 128) {
		xasprintf(&bad, "%s.bad", path);
		log_warnx("webhook: damaged spool file %s kept as %s", path,
		    bad);
		if (rename(path, bad) == -1)
			log_warn("webhook: rename %s", path);
		free(bad);
		r->spool_errors++;
		json_decref(j);
		return;
	}
	dl = xcalloc(1, sizeof *dl);
	dl->rcv = r;
	dl->seq = seq;
	dl->id = xstrdup(id);
	dl->body = xmalloc(len + 1);
	memcpy(dl->body, body, len);
	dl->body[len] = '\0';
	dl->len = len;
	dl->path = xstrdup(path);
	dl->info = info;
	dl->experiment = webhook_spool_experiment(body, len);
	json_decref(j);
	if (seq >= r->w->seq)
		r->w->seq = seq + 1;
	if (webhook_spool_room(r, dl) == -1) {
		webhook_spool_forget(dl);
		dl->len = 0;
		webhook_delivery_free(dl);
		return;
	}
	r->spool_used += len;
	webhook_spool_insert(r, dl);
}

void
webhook_spool_load(struct receiver *r)
{
	DIR *dir;
	struct dirent *de;
	struct stat st;
	char *path, *end;
	uint64_t seq;
	size_t n = 0;

	if ((dir = opendir(r->spool)) == NULL) {
		log_warn("webhook: opendir %s", r->spool);
		return;
	}
	while ((de = readdir(dir)) != NULL) {
		if (de->d_name[0] == '.')
			continue;
		xasprintf(&path, "%s/%s", r->spool, de->d_name);
		if (strlen(de->d_name) == 16 + 9 &&
		    strcmp(de->d_name + 16, ".json.tmp") == 0) {
			/* A write that never completed: nothing was sent. */
			unlink(path);
			free(path);
			continue;
		}
		errno = 0;
		seq = strtoull(de->d_name, &end, 16);
		if (strlen(de->d_name) != 16 + 5 || end != de->d_name + 16 ||
		    strcmp(end, ".json") != 0 || errno != 0) {
			free(path);
			continue;
		}
		if (stat(path, &st) == -1 || !S_ISREG(st.st_mode) ||
		    st.st_size > WEBHOOK_SPOOL_MAX) {
			log_warnx("webhook: skipping spool file %s", path);
			free(path);
			continue;
		}
		webhook_spool_load_one(r, path, seq);
		n++;
		free(path);
	}
	closedir(dir);
	if (n > 0)
		log_info("webhook: loaded spool receiver=%s deliveries=%u",
		    r->name, r->nwaiting);
}
