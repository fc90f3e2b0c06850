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
 * Restore is all-or-nothing: a wrong magic, version, length or checksum,
 * unreadable JSON or state the engine refuses ends start-up with a clear
 * error (the operator may move the file away to start afresh); a missing
 * file is a fresh start.
 */
#include <sys/stat.h>

#include <errno.h>
#include <fcntl.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <openssl/evp.h>

#include "stopcock/log.h"
#include "daemon.h"

#define CKPT_MAGIC "STOPCOCK-CKPT"
#define CKPT_VERSION 1
#define CKPT_FORMAT "stopcock-checkpoint"
#define CKPT_FILE "checkpoint"
#define CKPT_TEMP "checkpoint.tmp"
#define CKPT_HEADER_MAX 256
#define CKPT_SIZE_MAX ((off_t)2 << 30)	/* refuse bigger files */

static int
ckpt_sha256(const void *p, size_t len, char hex[65])
{
	unsigned char md[EVP_MAX_MD_SIZE];
	unsigned int n, i;

	if (EVP_Digest(p, len, md, &n, EVP_sha256(), NULL) != 1 || n != 32)
		return -1;
	for (i = 0; i < n; i++)
		snprintf(hex + 2 * i, 3, "%02x", md[i]);
	return 0;
}

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
	if (d->listen != NULL)
		json_object_set_new(counters, "listen", listen_json(d->listen));
	if (d->redis != NULL)
		json_object_set_new(counters, "redis", redis_in_json(d->redis));
	json_object_set_new(counters, "checkpoints",
	    json_integer((json_int_t)d->checkpoints + 1));
	json_object_set_new(root, "counters", counters);
	json_object_set_new(root, "summary", engine_json_list(d->engine));
	return root;
}

int
ckpt_write(struct daemon *d, char **cause)
{
	json_t *root;
	char *payload = NULL, *header = NULL, *path;
	const char *parts[2];
	size_t lens[2], len;
	char sha[65];
	double start = daemon_now();
	int rc = -1;

	xasprintf(&path, "%s/%s", d->state_dir, CKPT_FILE);
	if ((root = ckpt_build(d, cause)) == NULL)
		goto out;
	payload = json_dumps(root, JSON_COMPACT | JSON_REAL_PRECISION(17));
	json_decref(root);
	if (payload == NULL) {
		*cause = xstrdup("cannot serialise the checkpoint");
		goto out;
	}
	len = strlen(payload);
	if (ckpt_sha256(payload, len, sha) != 0) {
		*cause = xstrdup("SHA-256 failed");
		goto out;
	}
	xasprintf(&header, "%s %d %zu %s\n", CKPT_MAGIC, CKPT_VERSION, len,
	    sha);
	parts[0] = header;
	lens[0] = strlen(header);
	parts[1] = payload;
	lens[1] = len;
	if (durable_write(d->state_dir, path, parts, lens, 2, 0640,
	    cause) != 0)
		goto out;
	rc = 0;
	d->checkpoints++;
	d->last_checkpoint = daemon_now();
	log_debug("checkpoint written bytes=%zu ms=%.1f redis_last_id=%s",
	    len, (d->last_checkpoint - start) * 1e3,
	    d->redis != NULL ? redis_in_last_id(d->redis) : "");
	if (d->redis != NULL)
		redis_in_covered(d->redis);
out:
	free(payload);
	free(header);
	free(path);
	return rc;
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
	if (ckpt_sha256(buf + hlen, len - hlen, sha) != 0) {
		xasprintf(cause, "%s: SHA-256 failed", path);
		return -1;
	}
	if (strcmp(sha, fields[3]) != 0) {
		xasprintf(cause, "%s: checkpoint checksum mismatch (corrupt)",
		    path);
		return -1;
	}
	*payload = buf + hlen;
	*plen = len - hlen;
	return 0;
}

int
ckpt_restore(struct daemon *d, char **cause)
{
	char *path, *tmp, *buf = NULL, *payload, *why = NULL;
	size_t len, plen;
	json_t *root = NULL, *v, *alerts, *counters;
	json_error_t jerr;
	struct engine *engine;
	const char *last_id = "", *stream = NULL;
	double written = 0;
	int rc = -1, r;

	xasprintf(&path, "%s/%s", d->state_dir, CKPT_FILE);
	xasprintf(&tmp, "%s/%s", d->state_dir, CKPT_TEMP);
	(void)unlink(tmp);	/* left by a crash mid-write */
	r = ckpt_read(path, &buf, &len, cause);
	if (r == 1) {
		log_info("no checkpoint: fresh start path=%s", path);
		rc = 0;
		goto out;
	}
	if (r != 0 || ckpt_frame(path, buf, len, &payload, &plen, cause) != 0)
		goto out;
	root = json_loadb(payload, plen, JSON_REJECT_DUPLICATES, &jerr);
	if (root == NULL) {
		xasprintf(cause, "%s: bad checkpoint JSON: %s (line %d)", path,
		    jerr.text, jerr.line);
		goto out;
	}
	v = json_object_get(root, "format");
	if (!json_is_string(v) || strcmp(json_string_value(v),
	    CKPT_FORMAT) != 0 || json_integer_value(json_object_get(root,
	    "version")) != CKPT_VERSION) {
		xasprintf(cause, "%s: not a stopcock checkpoint (format)",
		    path);
		goto out;
	}
	v = json_object_get(root, "redis_last_id");
	if (v != NULL) {
		if (!json_is_string(v) ||
		    !ckpt_entry_id(json_string_value(v))) {
			xasprintf(cause, "%s: bad redis_last_id", path);
			goto out;
		}
		last_id = json_string_value(v);
	}
	v = json_object_get(root, "redis_stream");
	if (json_is_string(v))
		stream = json_string_value(v);
	v = json_object_get(root, "engine");
	if (!json_is_object(v)) {
		xasprintf(cause, "%s: no engine state", path);
		goto out;
	}
	engine = engine_restore(d->conf, d->hashkey, v, &why);
	if (engine == NULL) {
		xasprintf(cause, "%s: engine state refused: %s", path,
		    why != NULL ? why : "unknown error");
		goto out;
	}
	d->engine = engine;
	alerts = json_object_get(root, "alerts");
	if (d->alert != NULL && alerts != NULL &&
	    alert_restore(d->alert, alerts, &why) != 0) {
		xasprintf(cause, "%s: alert state refused: %s", path,
		    why != NULL ? why : "unknown error");
		engine_free(d->engine);
		d->engine = NULL;
		goto out;
	}
	counters = json_object_get(root, "counters");
	ingest_restore(d, json_object_get(counters, "ingest"));
	d->checkpoints = (uint64_t)json_integer_value(json_object_get(counters,
	    "checkpoints"));
	if (*last_id != '\0' && stream != NULL &&
	    d->conf->redis_stream != NULL && d->conf->redis_address != NULL &&
	    strcmp(stream, d->conf->redis_stream) != 0) {
		log_warnx("checkpoint: its Redis position belongs to stream "
		    "%s, not %s: reading %s from the group's position", stream,
		    d->conf->redis_stream, d->conf->redis_stream);
		last_id = "";
	}
	free(d->restored_redis_id);
	free(d->restored_redis_stream);
	d->restored_redis_id = xstrdup(last_id);
	d->restored_redis_stream = stream != NULL ? xstrdup(stream) : NULL;
	v = json_object_get(root, "written");
	if (json_is_number(v))
		written = json_number_value(v);
	log_info("checkpoint restored path=%s bytes=%zu age=%.1fs "
	    "redis_last_id=%s", path, len, daemon_now() - written,
	    *last_id != '\0' ? last_id : "none");
	rc = 0;
out:
	json_decref(root);
	free(why);
	free(buf);
	free(path);
	free(tmp);
	return rc;
}
