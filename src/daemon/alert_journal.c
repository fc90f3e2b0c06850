/*
 * alert_journal.c: the alerts' own write-ahead log. The checkpoint holds
 * the alert state only as of its snapshot; an alert raised after it would
 * be forgotten by a crash, and the records that raised it, delivered
 * again by Redis or Kafka, would raise it again: a second page. So every
 * event of an alert's life is appended here (the entry as it is after the
 * event, one JSON line with a sequence number) and synced before any
 * output hears of it. At start-up the lines newer than the checkpoint's
 * journal_seq are laid over the restored state; once a checkpoint that
 * covers a sequence number is on disk, the lines up to it are dropped.
 *
 * A torn last line (a crash half way through a write) or any other line
 * that does not parse is skipped, counted and logged; the lines around
 * it are kept. The file is bounded: past ALERT_JOURNAL_BYTES (only
 * reachable when checkpoints keep failing) events are no longer written,
 * counted and logged once, so a crash then may page twice, with the same
 * webhook-id.
 */
#include <sys/stat.h>

#include <errno.h>
#include <fcntl.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "stopcock/log.h"
#include "daemon.h"
#include "alert_int.h"

#define ALERT_JOURNAL_FILE	"alerts.journal"
#define ALERT_JOURNAL_BYTES	(32u * 1024 * 1024)	/* whole file */
#define ALERT_JOURNAL_LINE	(1024u * 1024)		/* one event */

struct alert_journal {
	char		*dir;
	char		*path;
	int		 fd;		/* O_APPEND; -1 when it failed */
	uint64_t	 bytes;		/* file size as written */
	uint64_t	 written;	/* events appended, this process */
	uint64_t	 replayed;	/* events laid over the checkpoint */
	uint64_t	 bad;		/* lines skipped on reading */
	uint64_t	 unwritten;	/* events not journaled (full, error) */
	int		 warned;	/* the first unwritten event was logged */
};

static int
alert_journal_reopen(struct alert_journal *j, char **cause)
{
	struct stat st;

	if (j->fd != -1)
		close(j->fd);
	j->fd = open(j->path, O_WRONLY | O_APPEND | O_CREAT | O_CLOEXEC,
	    0640);
	if (j->fd == -1 || fstat(j->fd, &st) != 0) {
		xasprintf(cause, "%s: %s", j->path, strerror(errno));
		if (j->fd != -1)
			close(j->fd);
		j->fd = -1;
		return -1;
	}
	j->bytes = (uint64_t)st.st_size;
	return 0;
}

struct alert_journal *
alert_journal_open(const char *dir, char **cause)
{
	struct alert_journal *j;

	j = xcalloc(1, sizeof *j);
	j->fd = -1;
	j->dir = xstrdup(dir);
	xasprintf(&j->path, "%s/%s", dir, ALERT_JOURNAL_FILE);
	if (alert_journal_reopen(j, cause) != 0) {
		alert_journal_free(j);
		return NULL;
	}
	return j;
}

void
alert_journal_free(struct alert_journal *j)
{
	if (j == NULL)
		return;
	if (j->fd != -1)
		close(j->fd);
	free(j->dir);
	free(j->path);
	free(j);
}

static void
alert_journal_unwritten(struct alert_journal *j, const char *why)
{
	j->unwritten++;
	if (!j->warned)
		log_warnx("alert journal: %s; alerts raised from now until the "
		    "next checkpoint may be sent again after a crash path=%s",
		    why, j->path);
	j->warned = 1;
}

/*
 * Append one event (the entry's saved form, with its sequence number)
 * and sync it: the caller sends the event only after this returns.
 */
void
alert_journal_append(struct alert_journal *j, uint64_t seq,
    const json_t *entry)
{
	json_t *line;
	char *text, *cause = NULL;
	size_t len;
	ssize_t n;

	if (j == NULL)
		return;
	if (j->fd == -1) {
		alert_journal_unwritten(j, "the journal is not open");
		return;
	}
	line = json_pack("{s:I, s:O}", "seq", (json_int_t)seq, "alert",
	    entry);
	text = line != NULL ? json_dumps(line, JSON_COMPACT |
	    JSON_REAL_PRECISION(17)) : NULL;
	json_decref(line);
	if (text == NULL) {
		alert_journal_unwritten(j, "cannot serialise an event");
		return;
	}
	len = strlen(text);
	if (len + 1 > ALERT_JOURNAL_LINE ||
	    j->bytes + len + 1 > ALERT_JOURNAL_BYTES) {
		free(text);
		alert_journal_unwritten(j, "the journal is full");
		return;
	}
	text[len] = '\n';	/* the NUL goes: written by length */
	/* One write of O_APPEND: a crash leaves the line whole or torn at
	 * the end, never interleaved. */
	n = write(j->fd, text, len + 1);
	free(text);
	if (n != (ssize_t)(len + 1) || fdatasync(j->fd) != 0) {
		log_warn("alert journal: write path=%s", j->path);
		alert_journal_unwritten(j, "a write failed");
		/* A short write may have left a torn line, which the
		 * reader skips; the size is read again. */
		if (alert_journal_reopen(j, &cause) != 0) {
			log_warnx("alert journal: %s", cause);
			free(cause);
		}
		return;
	}
	j->bytes += len + 1;
	j->written++;
}

/* The file's lines, each parsed; calls fn on those with seq > after. */
static int
alert_journal_scan(struct alert_journal *j, uint64_t after,
    void (*fn)(void *, uint64_t, const json_t *), void *arg, char **keep,
    size_t *keeplen)
{
	FILE *f;
	char *line = NULL;
	size_t cap = 0, out = 0;
	ssize_t len;
	json_t *o;
	json_int_t seq;
	json_t *entry;
	uint64_t lineno = 0;

	if ((f = fopen(j->path, "re")) == NULL)
		return errno == ENOENT ? 0 : -1;
	while ((len = getline(&line, &cap, f)) != -1) {
		lineno++;
		if (len > 0 && line[len - 1] == '\n')
			line[--len] = '\0';
		else if (len > 0) {
			/* Torn by a crash mid-write: the event was never
			 * sent (the sync comes first). */
			j->bad++;
			log_warnx("alert journal: torn last line skipped "
			    "path=%s line=%" PRIu64, j->path, lineno);
			continue;
		}
		o = (size_t)len <= ALERT_JOURNAL_LINE ?
		    json_loadb(line, (size_t)len, 0, NULL) : NULL;
		if (o == NULL || json_unpack(o, "{s:I, s:o}", "seq", &seq,
		    "alert", &entry) == -1 || seq < 1 ||
		    !json_is_object(entry)) {
			j->bad++;
			log_warnx("alert journal: bad line skipped path=%s "
			    "line=%" PRIu64, j->path, lineno);
			json_decref(o);
			continue;
		}
		if ((uint64_t)seq > after) {
			if (fn != NULL)
				fn(arg, (uint64_t)seq, entry);
			if (keep != NULL) {
				*keep = xreallocarray(*keep, 1, out + (size_t)len +
				    1);
				memcpy(*keep + out, line, (size_t)len);
				(*keep)[out + (size_t)len] = '\n';
				out += (size_t)len + 1;
			}
		}
		json_decref(o);
	}
	free(line);
	fclose(f);
	if (keeplen != NULL)
		*keeplen = out;
	return 0;
}

/* Lay the events newer than the checkpoint's over the restored state. */
int
alert_journal_replay(struct alert_journal *j, uint64_t after,
    void (*fn)(void *, uint64_t, const json_t *), void *arg)
{
	uint64_t before = j->bad;

	if (alert_journal_scan(j, after, fn, arg, NULL, NULL) != 0) {
		log_warn("alert journal: read path=%s", j->path);
		return -1;
	}
	if (j->bad > before)
		log_warnx("alert journal: %" PRIu64 " line(s) skipped path=%s",
		    j->bad - before, j->path);
	return 0;
}

void
alert_journal_replayed(struct alert_journal *j)
{
	if (j != NULL)
		j->replayed++;
}

/*
 * A checkpoint holding every event up to seq is on disk: keep only the
 * later lines (written since its snapshot), atomically.
 */
void
alert_journal_covered(struct alert_journal *j, uint64_t seq)
{
	char *keep = NULL, *cause = NULL;
	const char *parts[1];
	size_t len = 0;

	if (j == NULL || j->bytes == 0)
		return;
	if (alert_journal_scan(j, seq, NULL, NULL, &keep, &len) != 0) {
		log_warn("alert journal: read path=%s", j->path);
		free(keep);
		return;
	}
	parts[0] = keep != NULL ? keep : "";
	if (durable_write(j->dir, j->path, parts, &len, 1, 0640,
	    &cause) != 0) {
		log_warnx("alert journal: cannot drop covered events: %s",
		    cause);
		free(cause);
	} else if (alert_journal_reopen(j, &cause) != 0) {
		log_warnx("alert journal: %s", cause);
		free(cause);
	} else
		j->warned = 0;
	free(keep);
}

void
alert_journal_metrics(const struct alert_journal *j, struct evbuffer *b)
{
	metrics_counter(b, "stopcock_alert_journal_events_total", "Alert "
	    "events written to the alert journal before they were sent.",
	    j != NULL ? j->written : 0);
	metrics_counter(b, "stopcock_alert_journal_replayed_total", "Alert "
	    "events laid over the checkpoint from the journal at start-up.",
	    j != NULL ? j->replayed : 0);
	metrics_counter(b, "stopcock_alert_journal_bad_lines_total", "Lines "
	    "of the alert journal skipped as torn or unreadable.",
	    j != NULL ? j->bad : 0);
	metrics_counter(b, "stopcock_alert_journal_unwritten_total", "Alert "
	    "events sent without being journaled (journal full or failing).",
	    j != NULL ? j->unwritten : 0);
}
