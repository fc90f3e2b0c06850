/*
 * retire.c: an experiment leaves the daemon (POST
 * /api/experiments/ID/retire). The engine applies what the experiment
 * still holds, looks at its tests a last time and hands back its final
 * state; this file writes that archive into the state directory as
 * archive-ID-TIME.json, whole or not at all (durable.c: temporary file,
 * fsync, rename, fsync of the directory). The engine has then forgotten
 * the experiment, which frees its slot under max_experiments, and its
 * FINDING_RETIRED (dispatch.c) ends its alerts and tells the webhooks.
 * With [defaults] retire_idle, the tick retires experiments no record
 * reached for that long the same way.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/log.h"
#include "daemon.h"

#define RETIRE_PER_TICK	16	/* idle experiments retired per tick */

int
retire_experiment(struct daemon *d, const char *id, const char *why,
    char **path_out, char **cause)
{
	const char *parts[1];
	size_t lens[1];
	json_t *archive = NULL;
	char *text, *path;
	double now = daemon_now();
	struct engine *e;

	*path_out = NULL;
	/* a directory that cannot take the archive refuses the retirement
	 * before the engine lets go of anything */
	if (durable_mkdirs(d->state_dir, 0750, cause) != 0)
		return -1;
	if ((e = engines_find(d, id)) == NULL)
		e = d->engine;	/* which says there is no such experiment */
	if (engine_retire(e, id, why, now, &archive, cause) != 0)
		return -1;
	engines_touched(d, e);
	text = json_dumps(archive, JSON_INDENT(1) | JSON_REAL_PRECISION(17));
	json_decref(archive);
	if (text == NULL)
		fatalx("retire: cannot serialise the archive of %s", id);
	xasprintf(&path, "%s/archive-%s-%.0f.json", d->state_dir, id,
	    floor(now));
	parts[0] = text;
	lens[0] = strlen(text);
	if (durable_write(d->state_dir, path, parts, lens, 1, 0640,
	    cause) != 0) {
		/* the engine no longer holds it: the log keeps it */
		log_warnx("retire: archive not written experiment=%s path=%s "
		    "error=\"%s\"; its final state follows", id, path,
		    *cause ? *cause : "?");
		log_warnx("retire: archive %s", text);
		free(path);
		free(text);
		return -1;
	}
	log_info("retire: archived experiment=%s path=%s reason=%s", id, path,
	    why);
	free(text);
	*path_out = path;
	return 0;
}

/* On the tick: retire what was idle for retire_idle, a few at a time. */
void
retire_idle(struct daemon *d)
{
	const char *id = NULL;
	char *path = NULL, *cause = NULL, name[PROTO_NAME_MAX + 1];
	struct engine *e;
	size_t i;
	int n;

	/* A standby's state is a stale copy: the holder retires. */
	if (!redis_lease_may_checkpoint(redis_in_lease(d->redis)))
		return;
	for (n = 0; n < RETIRE_PER_TICK; n++) {
		for (i = 0; (e = engines_at(d, i)) != NULL; i++)
			if ((id = engine_idle(e, daemon_now(),
			    d->conf->retire_idle)) != NULL)
				break;
		if (e == NULL)
			return;
		snprintf(name, sizeof name, "%s", id);
		if (retire_experiment(d, name, "idle", &path, &cause) != 0) {
			/* the next tick tries again; no loop on a bad disk */
			log_warnx("retire: idle experiment=%s not retired: %s",
			    name, cause ? cause : "?");
			free(cause);
			return;
		}
		free(path);
	}
}
