/*
 * ckpt.c: the daemon's checkpoint, the one file that makes restarts
 * lossless. It holds the engine's full state, the alert states, the last
 * applied Redis entry ID and the ingest counters, as one JSON object:
 *
 *   {"format": "stopcock-checkpoint", "version": 1, "written": TS,
 *    "engine": engine_save(), "alerts": alert_save(),
 *    "redis_last_id": "1700000000000-0", "redis_stream": "...",
 *    "counters": {"ingest": ..., "listen": ..., "redis": ...},
 *    "summary": engine_json_list()}
 *
 * "summary" and the listen/redis counters are for people and tests
 * reading the file; restore ignores them. The JSON is framed by a header
 * line
 *
 *   STOPCOCK-CKPT 1 <payload-length> <sha256-hex>\n
 *
 * and written atomically: a temporary file in the state directory,
 * fsync, rename over `checkpoint`, fsync of the directory. A crash at any
 * moment leaves either the old file or the new one, never a mix.
 *
 * The periodic and requested checkpoints never stall the loop: the
 * daemon forks, and the child, holding a copy-on-write snapshot of every
 * structure as it was at that instant, builds the JSON, hashes it and
 * writes it while the parent goes on with ingest, HTTP and Redis. The
 * parent learns the outcome when the child's pipe closes; only then does
 * it count the checkpoint and let the Redis consumer acknowledge the
 * entries it covers (the last ID applied at the fork, not now). One child
 * at a time: a request meanwhile is run when it ends. The child dies
 * with the parent (PR_SET_PDEATHSIG), so a killed daemon never has an
 * old snapshot renamed over a newer checkpoint after its restart. The
 * last checkpoint at shutdown is written in the process itself, after
 * any child ended. Memory: pages the parent changes while the child
 * writes are copied, at most the state's size.
 *
 * Restore is all-or-nothing: a wrong magic, version, length or checksum,
 * unreadable JSON or state the engine refuses ends start-up with a clear
 * error (the operator may move the file away to start afresh); a missing
 * file is a fresh start.
 */
#include <sys/prctl.h>
#include <sys/stat.h>
#include <sys/wait.h>

#include <errno.h>
#include <fcntl.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <signal.h>

#include <event2/event.h>

#include "stopcock/log.h"
#include "daemon.h"

#define CKPT_MAGIC "STOPCOCK-CKPT"
#define CKPT_VERSION 1
#define CKPT_FORMAT "stopcock-checkpoint"
#define CKPT_FILE "checkpoint"
#define CKPT_TEMP "checkpoint.tmp"
#define CKPT_HEADER_MAX 256
#define CKPT_SIZE_MAX ((off_t)2 << 30)	/* refuse bigger files */
#define CKPT_CAUSE_MAX 1024	/* bytes of a child's error text */
#define CKPT_FENCED 2		/* ckpt_store: Redis refused (the lease) */
#define CKPT_EXIT_FENCED 4	/* the writer child's exit for it */

/* The writer child, when one runs. */
struct ckpt {
	struct daemon	*d;
	pid_t		 pid;		/* 0: none running */
	int		 fd;		/* read end of the child's pipe */
	struct event	*ev;
	char		*covered;	/* Redis ID applied at the fork */
	uint64_t	 jseq;		/* alert journal event at the fork */
	char		*why;
	double		 start;
	char		 cause[CKPT_CAUSE_MAX];
	size_t		 causelen;
	int		 again;		/* requested while one ran */
	pid_t		 owner;		/* the daemon's pid (for "writer") */
};

static json_t *
ckpt_build(struct daemon *d, char **cause)
{
	json_t *root, *engine, *counters;
	const char *last_id = "", *stream = NULL;

	engine = engine_save(d->engine);
	if (engine == NULL) {
		*cause = xstrdup("the engine could not save its state");
		return NULL;
	}
	if (d->redis != NULL) {
		last_id = redis_in_last_id(d->redis);
		stream = d->conf->redis_stream;
	} else if (d->restored_redis_id != NULL) {
		/* No consumer now: keep the mark for when it comes back. */
		last_id = d->restored_redis_id;
		stream = d->restored_redis_stream;
	}
	root = json_object();
	json_object_set_new(root, "format", json_string(CKPT_FORMAT));
	json_object_set_new(root, "version", json_integer(CKPT_VERSION));
	json_object_set_new(root, "written", json_real(daemon_now()));
	json_object_set_new(root, "engine", engine);
	json_object_set_new(root, "alerts", d->alert != NULL ?
	    alert_save(d->alert) : json_object());
	json_object_set_new(root, "redis_last_id", json_string(last_id));
	if (stream != NULL)
		json_object_set_new(root, "redis_stream", json_string(stream));
	counters = json_object();
	json_object_set_new(counters, "ingest", ingest_json(d));
	json_object_set_new(counters, "auth", auth_json(d));
	if (d->listen != NULL)
		json_object_set_new(counters, "listen", listen_json(d->listen));
	if (d->redis != NULL)
		json_object_set_new(counters, "redis", redis_in_json(d->redis));
	json_object_set_new(counters, "checkpoints",
	    json_integer((json_int_t)d->checkpoints + 1));
	json_object_set_new(root, "counters", counters);
	json_object_set_new(root, "summary", engine_json_list(d->engine));
	if (redis_lease_ha(redis_in_lease(d->redis)))
		/* Which daemon wrote the checkpoint in Redis, for people
		 * (and tests) reading it; restore ignores it. */
		json_object_set_new(root, "writer", json_pack("{s:I}", "pid",
		    (json_int_t)(d->ckpt != NULL && d->ckpt->owner != 0 ?
		    d->ckpt->owner : getpid())));
	return root;
}

/* Build, hash and store the checkpoint; the caller's snapshot. */
static int
ckpt_store(struct daemon *d, char **cause)
{
	json_t *root;
	char *payload, *header = NULL, *path;
	const char *parts[2];
	size_t lens[2], len;
	char sha[65];
	struct redis_lease *lease = redis_in_lease(d->redis);
	int rc = -1;

	if ((root = ckpt_build(d, cause)) == NULL)
		return -1;
	payload = json_dumps(root, JSON_COMPACT | JSON_REAL_PRECISION(17));
	json_decref(root);
	if (payload == NULL) {
		*cause = xstrdup("cannot serialise the checkpoint");
		return -1;
	}
	len = strlen(payload);
	digest_sha256_hex(payload, len, 32, sha);
	xasprintf(&header, "%s %d %zu %s\n", CKPT_MAGIC, CKPT_VERSION, len,
	    sha);
	parts[0] = header;
	lens[0] = strlen(header);
	parts[1] = payload;
	lens[1] = len;
	/* Under ha the copy in Redis is the one that counts: written first,
	 * under the lease; the file is then a local copy of it. */
	if (redis_lease_ha(lease) && (rc = redis_lease_store(lease, parts,
	    lens, 2, d->draining, cause)) != 0) {
		if (rc == 1)
			rc = CKPT_FENCED;
		free(payload);
		free(header);
		return rc;
	}
	rc = -1;
	xasprintf(&path, "%s/%s", d->state_dir, CKPT_FILE);
	if (durable_write(d->state_dir, path, parts, lens, 2, 0640,
	    cause) == 0)
		rc = 0;
	free(path);
	free(payload);
	free(header);
	return rc;
}

/* A checkpoint holding everything up to Redis ID covered, and the alert
 * journal's events up to jseq, is on disk. */
static void
ckpt_done(struct daemon *d, const char *covered, uint64_t jseq, double start)
{
	d->checkpoints++;
	alert_journal_done(d->alert, jseq);
	d->last_checkpoint = daemon_now();
	log_debug("checkpoint written ms=%.1f redis_last_id=%s",
	    (d->last_checkpoint - start) * 1e3, covered);
	if (d->redis != NULL)
		redis_in_covered(d->redis, covered);
}

static void	ckpt_reap(struct ckpt *, int wait);

/* Synchronous: shutdown's last checkpoint, or when fork fails. */
int
ckpt_write(struct daemon *d, char **cause)
{
	char *covered;
	uint64_t jseq = alert_journal_seq(d->alert);
	double start = daemon_now();
	int rc;

	if (d->ckpt != NULL && d->ckpt->pid != 0) {
		d->ckpt->again = 0;	/* this write serves it */
		ckpt_reap(d->ckpt, 1);
	}
	covered = xstrdup(d->redis != NULL ? redis_in_last_id(d->redis) : "");
	if ((rc = ckpt_store(d, cause)) != 0) {
		if (rc == CKPT_FENCED) {
			redis_lease_fenced(redis_in_lease(d->redis));
			*cause = xstrdup("refused by Redis: another daemon holds "
			    "the lease");
		}
		free(covered);
		return -1;
	}
	ckpt_done(d, covered, jseq, start);
	free(covered);
	return 0;
}

/* In the child: nothing of the parent's but memory, then _exit. */
static void SC_NORETURN
ckpt_child(struct daemon *d, pid_t parent, int wfd)
{
	static const int sigs[] = { SIGTERM, SIGINT, SIGHUP, SIGUSR1 };
	char *cause = NULL;
	size_t i;
	int rc;

	/* Die with the parent: a killed daemon's restart must not see an
	 * older snapshot renamed over its own newer checkpoint. */
	if (prctl(PR_SET_PDEATHSIG, SIGKILL) != 0 || getppid() != parent)
		_exit(2);
	for (i = 0; i < SC_NELEM(sigs); i++)
		signal(sigs[i], SIG_DFL);
	/* Sockets of clients, Redis and receivers stay the parent's alone
	 * (a client's close must not wait for this child to exit). */
	if (wfd != 3) {
		if (dup2(wfd, 3) == -1)
			_exit(2);
		wfd = 3;
	}
	close_range(4, ~0U, 0);
	rc = ckpt_store(d, &cause);
	if (rc == CKPT_FENCED)
		_exit(CKPT_EXIT_FENCED);
	if (rc != 0 && cause != NULL) {
		size_t len = strlen(cause);

		if (len > CKPT_CAUSE_MAX - 1)
			len = CKPT_CAUSE_MAX - 1;
		if (write(wfd, cause, len) < 0)
			rc = 3;
	}
	_exit(rc == 0 ? 0 : 1);
}

/* The child's outcome: count the checkpoint or log why it failed. */
static void
ckpt_reap(struct ckpt *c, int wait)
{
	struct daemon *d = c->d;
	int status = 0;
	pid_t pid;

	do
		pid = waitpid(c->pid, &status, wait ? 0 : WNOHANG);
	while (pid == -1 && errno == EINTR);
	if (pid == 0)
		return;		/* pipe closed, exit not seen yet */
	event_del(c->ev);
	close(c->fd);
	c->fd = -1;
	c->pid = 0;
	if (pid == -1)
		log_warn("checkpoint: waitpid");
	else if (WIFEXITED(status) && WEXITSTATUS(status) == 0)
		ckpt_done(d, c->covered, c->jseq, c->start);
	else if (WIFEXITED(status) && WEXITSTATUS(status) == CKPT_EXIT_FENCED) {
		redis_lease_fenced(redis_in_lease(d->redis));
		log_warnx("checkpoint refused by Redis (%s): another daemon "
		    "holds the lease; this one changes nothing", c->why);
	}
	else if (c->causelen > 0)
		log_warnx("checkpoint failed (%s): %.*s", c->why,
		    (int)c->causelen, c->cause);
	else if (WIFSIGNALED(status))
		log_warnx("checkpoint failed (%s): the writer was killed "
		    "(%s)", c->why, strsignal(WTERMSIG(status)));
	else
		log_warnx("checkpoint failed (%s): the writer failed "
		    "(exit %d)", c->why, WEXITSTATUS(status));
	free(c->covered);
	c->covered = NULL;
	c->causelen = 0;
	if (c->again && !d->draining) {
		c->again = 0;
		ckpt_start(d, "again");
	}
}

static void
ckpt_pipe_cb(evutil_socket_t fd, short what, void *arg)
{
	struct ckpt *c = arg;
	ssize_t n;

	n = read(c->fd, c->cause + c->causelen,
	    sizeof c->cause - 1 - c->causelen);
	if (n > 0) {
		c->causelen += (size_t)n;
		if (c->causelen < sizeof c->cause - 1)
			return;
	} else if (n == -1 && (errno == EINTR || errno == EAGAIN))
		return;
	ckpt_reap(c, 1);	/* EOF: the child is gone or going */
}

static struct ckpt *
ckpt_get(struct daemon *d)
{
	struct ckpt *c = d->ckpt;

	if (c == NULL) {
		c = d->ckpt = xcalloc(1, sizeof *c);
		c->d = d;
		c->fd = -1;
		c->owner = getpid();
	}
	return c;
}

/*
 * Start a checkpoint in a child process; why goes to the log. Returns at
 * once. When fork fails the checkpoint is written here, stalling the
 * loop once rather than going without.
 */
void
ckpt_start(struct daemon *d, const char *why)
{
	struct ckpt *c = ckpt_get(d);
	char *cause = NULL;
	int p[2];
	pid_t pid, parent = getpid();

	if (c->pid != 0) {
		c->again = 1;
		return;
	}
	if (pipe2(p, O_CLOEXEC) != 0) {
		log_warn("checkpoint: pipe; writing it in the loop");
		goto inline_write;
	}
	c->covered = xstrdup(d->redis != NULL ? redis_in_last_id(d->redis) :
	    "");
	c->jseq = alert_journal_seq(d->alert);
	c->start = daemon_now();
	free(c->why);
	c->why = xstrdup(why);
	pid = fork();
	if (pid == -1) {
		log_warn("checkpoint: fork; writing it in the loop");
		close(p[0]);
		close(p[1]);
		free(c->covered);
		c->covered = NULL;
		goto inline_write;
	}
	if (pid == 0) {
		close(p[0]);
		ckpt_child(d, parent, p[1]);
	}
	close(p[1]);
	log_debug("checkpoint: writer started pid=%ld reason=%s fork_ms=%.1f",
	    (long)pid, why, (daemon_now() - c->start) * 1e3);
	c->pid = pid;
	c->fd = p[0];
	c->causelen = 0;
	if (c->ev != NULL)
		event_free(c->ev);
	c->ev = event_new(d->base, c->fd, EV_READ | EV_PERSIST, ckpt_pipe_cb,
	    c);
	if (c->ev == NULL || event_add(c->ev, NULL) != 0) {
		log_warnx("checkpoint: cannot watch the writer; waiting "
		    "for it");
		ckpt_reap(c, 1);
	}
	return;
inline_write:
	if (ckpt_write(d, &cause) != 0) {
		log_warnx("checkpoint failed (%s): %s", why, cause);
		free(cause);
	}
}

/* Wait for a running writer (shutdown), then free. */
void
ckpt_free(struct daemon *d)
{
	struct ckpt *c = d->ckpt;

	if (c == NULL)
		return;
	if (c->pid != 0)
		ckpt_reap(c, 1);
	if (c->ev != NULL)
		event_free(c->ev);
	free(c->covered);
	free(c->why);
	free(c);
	d->ckpt = NULL;
}

static int
ckpt_hex64(const char *s)
{
	size_t i;

	for (i = 0; i < 64; i++)
		if (!((s[i] >= '0' && s[i] <= '9') ||
		    (s[i] >= 'a' && s[i] <= 'f')))
			return 0;
	return s[64] == '\0';
}

/* "<ms>-<seq>" with decimal parts, or "". */
static int
ckpt_entry_id(const char *s)
{
	const char *p = s;

	if (*s == '\0')
		return 1;
	if (*p < '0' || *p > '9')
		return 0;
	while (*p >= '0' && *p <= '9')
		p++;
	if (*p++ != '-' || *p < '0' || *p > '9')
		return 0;
	while (*p >= '0' && *p <= '9')
		p++;
	return *p == '\0' && p - s < 44;
}

/* Read the whole file, bounded. */
static int
ckpt_read(const char *path, char **out, size_t *outlen, char **cause)
{
	struct stat st;
	char *buf;
	size_t got = 0;
	ssize_t n;
	int fd;

	fd = open(path, O_RDONLY | O_CLOEXEC);
	if (fd == -1) {
		if (errno == ENOENT)
			return 1;
		xasprintf(cause, "%s: %s", path, strerror(errno));
		return -1;
	}
	if (fstat(fd, &st) != 0 || st.st_size > CKPT_SIZE_MAX) {
		xasprintf(cause, "%s: %s", path, st.st_size > CKPT_SIZE_MAX ?
		    "larger than 2 GiB: not a checkpoint" : strerror(errno));
		close(fd);
		return -1;
	}
	buf = xmalloc((size_t)st.st_size + 1);
	while (got < (size_t)st.st_size) {
		n = read(fd, buf + got, (size_t)st.st_size - got);
		if (n == -1 && errno == EINTR)
			continue;
		if (n <= 0)
			break;
		got += (size_t)n;
	}
	close(fd);
	if (got != (size_t)st.st_size) {
		xasprintf(cause, "%s: short read", path);
		free(buf);
		return -1;
	}
	buf[got] = '\0';
	*out = buf;
	*outlen = got;
	return 0;
}

/* Check the header line; on success payload and plen frame the JSON. */
static int
ckpt_frame(const char *path, char *buf, size_t len, char **payload,
    size_t *plen, char **cause)
{
	char *nl, *fields[5], *save, *tok;
	char sha[65];
	uint64_t version, length;
	size_t hlen;
	int n = 0;

	nl = memchr(buf, '\n', len < CKPT_HEADER_MAX ? len : CKPT_HEADER_MAX);
	if (nl == NULL || strncmp(buf, CKPT_MAGIC " ", strlen(CKPT_MAGIC) + 1)
	    != 0) {
		xasprintf(cause, "%s: not a stopcock checkpoint (bad magic)",
		    path);
		return -1;
	}
	*nl = '\0';
	hlen = (size_t)(nl - buf) + 1;
	for (tok = strtok_r(buf, " ", &save); tok != NULL && n < 5;
	    tok = strtok_r(NULL, " ", &save))
		fields[n++] = tok;
	if (n != 4) {
		xasprintf(cause, "%s: malformed checkpoint header", path);
		return -1;
	}
	if (parse_u64(fields[1], UINT32_MAX, &version) != 0 ||
	    version != CKPT_VERSION) {
		xasprintf(cause, "%s: unsupported checkpoint version %s (this "
		    "stopcockd reads version %d)", path, fields[1],
		    CKPT_VERSION);
		return -1;
	}
	if (parse_u64(fields[2], UINT64_MAX, &length) != 0 ||
	    length != len - hlen) {
		xasprintf(cause, "%s: checkpoint length mismatch: the header "
		    "says %s bytes, the file holds %zu (truncated or "
		    "damaged)", path, fields[2], len - hlen);
		return -1;
	}
	if (!ckpt_hex64(fields[3])) {
		xasprintf(cause, "%s: malformed checksum in the header", path);
		return -1;
	}
	digest_sha256_hex(buf + hlen, len - hlen, 32, sha);
	if (strcmp(sha, fields[3]) != 0) {
		xasprintf(cause, "%s: checkpoint checksum mismatch (corrupt)",
		    path);
		return -1;
	}
	*payload = buf + hlen;
	*plen = len - hlen;
	return 0;
}

static int	ckpt_parse(const char *, char *, size_t, json_t **, char **);

/*
 * Read, frame and parse the checkpoint at path into *root. 1 when there
 * is no file (a fresh start), 0 with *root set, -1 with a cause.
 */
static int
ckpt_load(const char *path, json_t **root, size_t *size, char **cause)
{
	char *buf = NULL;
	size_t len;
	int r;

	*root = NULL;
	r = ckpt_read(path, &buf, &len, cause);
	if (r != 0)
		return r;
	*size = len;
	r = ckpt_parse(path, buf, len, root, cause);
	free(buf);
	return r;
}

/* A framed image in buf (changed in place) into *root. */
static int
ckpt_parse(const char *path, char *buf, size_t len, json_t **root,
    char **cause)
{
	char *payload;
	size_t plen;
	json_error_t jerr;
	json_t *v;

	if (ckpt_frame(path, buf, len, &payload, &plen, cause) != 0)
		return -1;
	*root = json_loadb(payload, plen, JSON_REJECT_DUPLICATES, &jerr);
	if (*root == NULL) {
		xasprintf(cause, "%s: bad checkpoint JSON: %s (line %d)", path,
		    jerr.text, jerr.line);
		return -1;
	}
	v = json_object_get(*root, "format");
	if (!json_is_string(v) || strcmp(json_string_value(v),
	    CKPT_FORMAT) != 0 || json_integer_value(json_object_get(*root,
	    "version")) != CKPT_VERSION) {
		xasprintf(cause, "%s: not a stopcock checkpoint (format)",
		    path);
		json_decref(*root);
		*root = NULL;
		return -1;
	}
	return 0;
}

/*
 * The Redis position: the last applied entry ID and its stream. A
 * position on another stream than the configured one is dropped (the
 * group's own position is used), with a warning.
 */
static int
ckpt_redis_position(struct daemon *d, const char *path, json_t *root,
    const char **last_id, char **cause)
{
	const char *stream = NULL;
	json_t *v;

	*last_id = "";
	v = json_object_get(root, "redis_last_id");
	if (v != NULL) {
		if (!json_is_string(v) ||
		    !ckpt_entry_id(json_string_value(v))) {
			xasprintf(cause, "%s: bad redis_last_id", path);
			return -1;
		}
		*last_id = json_string_value(v);
	}
	v = json_object_get(root, "redis_stream");
	if (json_is_string(v))
		stream = json_string_value(v);
	if (**last_id != '\0' && stream != NULL &&
	    d->conf->redis_stream != NULL && d->conf->redis_address != NULL &&
	    strcmp(stream, d->conf->redis_stream) != 0) {
		log_warnx("checkpoint: its Redis position belongs to stream "
		    "%s, not %s: reading %s from the group's position", stream,
		    d->conf->redis_stream, d->conf->redis_stream);
		*last_id = "";
	}
	free(d->restored_redis_id);
	free(d->restored_redis_stream);
	d->restored_redis_id = xstrdup(*last_id);
	d->restored_redis_stream = stream != NULL ? xstrdup(stream) : NULL;
	return 0;
}

/* Engine, alert states and counters, all or nothing. */
static int
ckpt_restore_state(struct daemon *d, const char *path, json_t *root,
    char **cause)
{
	json_t *v, *counters;
	struct engine *neng;
	char *why = NULL;

	v = json_object_get(root, "engine");
	if (!json_is_object(v)) {
		xasprintf(cause, "%s: no engine state", path);
		return -1;
	}
	neng = d->conf->kafka_brokers != NULL ?
	    engine_restore_shard(d->conf, d->hashkey, v, &why) :
	    engine_restore(d->conf, d->hashkey, v, &why);
	if (neng == NULL) {
		xasprintf(cause, "%s: engine state refused: %s", path,
		    why != NULL ? why : "unknown error");
		free(why);
		return -1;
	}
	v = json_object_get(root, "alerts");
	if (d->alert != NULL && v != NULL &&
	    alert_restore(d->alert, v, &why) != 0) {
		xasprintf(cause, "%s: alert state refused: %s", path,
		    why != NULL ? why : "unknown error");
		free(why);
		engine_free(neng);
		return -1;
	}
	/* At start there is no engine yet; taking over replaces one. */
	if (d->engine == NULL)
		d->engine = neng;
	else
		daemon_engine_replace(d, neng);
	counters = json_object_get(root, "counters");
	ingest_restore(d, json_object_get(counters, "ingest"));
	auth_restore(d, json_object_get(counters, "auth"));
	d->checkpoints = (uint64_t)json_integer_value(json_object_get(counters,
	    "checkpoints"));
	return 0;
}

int
ckpt_restore(struct daemon *d, char **cause)
{
	char *path, *tmp;
	const char *last_id;
	json_t *root = NULL, *v;
	size_t len = 0;
	double written = 0;
	int rc = -1, r;

	xasprintf(&path, "%s/%s", d->state_dir, CKPT_FILE);
	xasprintf(&tmp, "%s/%s", d->state_dir, CKPT_TEMP);
	(void)unlink(tmp);	/* left by a crash mid-write */
	r = ckpt_load(path, &root, &len, cause);
	if (r == 1) {
		log_info("no checkpoint: fresh start path=%s", path);
		rc = 0;
		goto out;
	}
	if (r != 0)
		goto out;
	/* The position is checked before any state is taken. */
	if (ckpt_redis_position(d, path, root, &last_id, cause) != 0 ||
	    ckpt_restore_state(d, path, root, cause) != 0)
		goto out;
	v = json_object_get(root, "written");
	if (json_is_number(v))
		written = json_number_value(v);
	log_info("checkpoint restored path=%s bytes=%zu age=%.1fs "
	    "redis_last_id=%s", path, len, daemon_now() - written,
	    *last_id != '\0' ? last_id : "none");
	rc = 0;
out:
	json_decref(root);
	free(path);
	free(tmp);
	return rc;
}

int
ckpt_adopt(struct daemon *d, const char *image, size_t len, char **cause)
{
	const char *what = "the checkpoint in Redis", *last_id;
	json_t *root = NULL;
	char *buf;
	int rc = -1;

	buf = xmalloc(len + 1);
	memcpy(buf, image, len);
	buf[len] = '\0';
	if (ckpt_parse(what, buf, len, &root, cause) == 0 &&
	    ckpt_redis_position(d, what, root, &last_id, cause) == 0 &&
	    ckpt_restore_state(d, what, root, cause) == 0)
		rc = 0;
	json_decref(root);
	free(buf);
	return rc;
}
