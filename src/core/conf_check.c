/*
 * conf_check.c: what a daemon needs of a configuration beyond what
 * conf_load checks (a file fit for `stopcock replay` may still lack an
 * input). One function, so `stopcock check-config` refuses exactly what
 * `stopcockd -t` refuses.
 */
#include <stddef.h>

#include "stopcock/conf.h"
#include "stopcock/util.h"

int
conf_check_daemon(const struct conf *conf, char **cause)
{
	const char *name = conf->path != NULL ? conf->path : "configuration";

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
	return 0;
}
