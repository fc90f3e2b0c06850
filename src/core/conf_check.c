/*
 * conf_check.c: what a daemon needs of a configuration beyond what
 * conf_load checks (a file fit for `stopcock replay` may still lack an
 * input). One function, so `stopcock check-config` refuses exactly what
 * `stopcockd -t` refuses. Besides the text it looks at the two things a
 * configuration names outside itself: the unix socket's group and the
 * producers' secret files (read with conf_secret_file, the daemon's
 * reader too).
 */
#include <sys/types.h>

#include <errno.h>
#include <grp.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/conf.h"
#include "stopcock/sign.h"
#include "stopcock/util.h"

#define CONF_SECRET_LINE_MAX 512	/* bytes of one line of a secret file */

int
conf_unix_group(const char *name, unsigned *gid, char **cause)
{
	struct group *gr;
	uint64_t n;

	if (parse_u64(name, 0x7fffffff, &n) == 0) {
		*gid = (unsigned)n;
		return 0;
	}
	errno = 0;
	if ((gr = getgrnam(name)) == NULL) {
		xasprintf(cause, "[daemon] unix_group %s: no such group%s%s",
		    name, errno != 0 ? ": " : "",
		    errno != 0 ? strerror(errno) : "");
		return -1;
	}
	*gid = (unsigned)gr->gr_gid;
	return 0;
}

int
conf_secret_file(const char *path, int (*fn)(void *, const char *,
    char **), void *arg, char **cause)
{
	char line[CONF_SECRET_LINE_MAX + 2], *why = NULL;
	unsigned char key[SIGN_KEY_MAX];
	size_t len, keylen;
	int lineno = 0, n = 0;
	FILE *f;

	if ((f = fopen(path, "re")) == NULL) {
		xasprintf(cause, "secret_file %s: %s", path, strerror(errno));
		return -1;
	}
	while (fgets(line, sizeof line, f) != NULL) {
		lineno++;
		len = strlen(line);
		if (len > CONF_SECRET_LINE_MAX) {
			xasprintf(cause, "secret_file %s:%d: line too long",
			    path, lineno);
			goto fail;
		}
		while (len > 0 && (line[len - 1] == '\n' ||
		    line[len - 1] == '\r' || line[len - 1] == ' '))
			line[--len] = '\0';
		if (len == 0 || line[0] == '#')
			continue;
		if (sign_secret_key(line, key, &keylen, &why) != 0 ||
		    (fn != NULL && fn(arg, line, &why) != 0)) {
			/* never the secret itself in a message */
			xasprintf(cause, "secret_file %s:%d: %s", path, lineno,
			    why);
			free(why);
			goto fail;
		}
		n++;
	}
	memset(line, 0, sizeof line);
	memset(key, 0, sizeof key);
	fclose(f);
	if (n == 0) {
		xasprintf(cause, "secret_file %s: no secret in it", path);
		return -1;
	}
	return 0;
fail:
	memset(line, 0, sizeof line);
	memset(key, 0, sizeof key);
	fclose(f);
	return -1;
}

int
conf_check_daemon(const struct conf *conf, char **cause)
{
	const char *name = conf->path != NULL ? conf->path : "configuration";
	char *why;
	unsigned gid;
	int i;

	if ((conf->tcp != NULL) + (conf->udp != NULL) +
	    (conf->unix_path != NULL) + (conf->redis_address != NULL) +
	    (conf->kafka_brokers != NULL) == 0) {
		xasprintf(cause, "%s: no input: set at least one of [daemon] "
		    "tcp, udp, unix, [redis] address or [kafka] brokers", name);
		return -1;
	}
	if (conf->state_dir == NULL || *conf->state_dir == '\0') {
		xasprintf(cause, "%s: [daemon] state is required", name);
		return -1;
	}
	if (conf->unix_group != NULL &&
	    conf_unix_group(conf->unix_group, &gid, &why) != 0) {
		xasprintf(cause, "%s: %s", name, why);
		free(why);
		return -1;
	}
	for (i = 0; i < conf->nproducers; i++) {
		if (conf->producers[i].secret_file == NULL)
			continue;
		if (conf_secret_file(conf->producers[i].secret_file, NULL,
		    NULL, &why) != 0) {
			xasprintf(cause, "%s: [producer %s] %s", name,
			    conf->producers[i].name, why);
			free(why);
			return -1;
		}
	}
	return 0;
}
