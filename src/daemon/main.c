/*
 * main.c: stopcockd's start-up, signals and loop. One struct daemon owns
 * every subsystem; this file builds them in dependency order (outputs
 * first, then the engine restored from the checkpoint with its sink, then
 * the inputs) so that nothing flows before the state it lands in exists,
 * and tells systemd READY=1 only then.
 *
 * The daemon runs in the foreground as systemd expects. Signals are loop
 * events handled in one switch: TERM and INT drain the inputs, write a
 * last checkpoint and leave the loop; HUP reloads the configuration all
 * or nothing; USR1 writes a checkpoint now; PIPE is ignored. Timers drive
 * the engine's tick, periodic checkpoints, the systemd watchdog and the
 * STATUS= line.
 */
#include <sys/random.h>
#include <sys/stat.h>
#include <sys/time.h>

#include <errno.h>
#include <inttypes.h>
#include <signal.h>
#include <stddef.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <event2/event.h>
#include <systemd/sd-daemon.h>

#include "stopcock/log.h"
#include "daemon.h"

#ifndef STOPCOCK_VERSION
#define STOPCOCK_VERSION "0.1.0"
#endif

#define DAEMON_CONF "/etc/stopcock/stopcock.conf"
#define DAEMON_STATUS_EVERY 5	/* seconds between STATUS= lines */
#define DAEMON_NSIGNALS 4	/* daemon_signals */

/* What only this file uses: how the process logs and exits, the loop's
 * signals and timers, the STATUS= line's rate. */
struct daemon_main {
	char		*conf_path;
	int		 debug;
	int		 log_stderr;	/* -d or -f: not syslog */
	int		 exit_code;
	struct event	*ev_signal[DAEMON_NSIGNALS];
	struct event	*ev_tick;
	struct event	*ev_checkpoint;
	struct event	*ev_status;
	struct event	*ev_watchdog;
	uint64_t	 status_records;	/* for the ingest rate */
	double		 status_time;
	double		 ingest_rate;	/* records/s, last status period */
};

static const int daemon_signals[DAEMON_NSIGNALS] = {
	SIGTERM, SIGINT, SIGHUP, SIGUSR1
};

const char *
source_name(enum source s)
{
	switch (s) {
	case SRC_TCP:
		return "tcp";
	case SRC_UDP:
		return "udp";
	case SRC_UNIX:
		return "unix";
	case SRC_REDIS:
		return "redis";
	case SRC_HTTP:
		return "http";
	case SRC_KAFKA:
		return "kafka";
	case SRC_N:
		break;
	}
	return "?";
}

double
daemon_now(void)
{
	struct timespec ts;

	clock_gettime(CLOCK_REALTIME, &ts);
	return ts.tv_sec + ts.tv_nsec / 1e9;
}

int
daemon_inputs(const struct conf *conf)
{
	return (conf->tcp != NULL) + (conf->udp != NULL) +
	    (conf->unix_path != NULL) + (conf->redis_address != NULL) +
	    (conf->kafka_brokers != NULL);
}

/* The main engine replaced whole (a Redis ha takeover adopts a state). */
void
daemon_engine_replace(struct daemon *d, struct engine *e)
{
	struct engine *old = d->engine;

	/* queued findings may point into the old engine */
	dispatch_drain(d->dispatch);
	d->engine = e;
	engine_set_sink(d->engine, dispatch_finding, d->dispatch);
	engine_free(old);
}

static void
daemon_options(FILE *fp)
{
	fprintf(fp, "usage: stopcockd [-dfht] [-c file] | --version\n"
	    "  -c file    configuration (default " DAEMON_CONF ")\n"
	    "  -d         log to stderr, debug lines included\n"
	    "  -f         log (and alert lines) to stderr instead of "
	    "syslog;\n"
	    "             alerts still go to syslog as configured\n"
	    "  -h         this help and every configuration key\n"
	    "  -t         check the configuration and exit\n"
	    "  --version  print the version and exit\n");
}

static void SC_NORETURN
daemon_usage(void)
{
	daemon_options(stderr);
	exit(SC_EX_USAGE);
}

/* Start-up failure: to the log and, when that is syslog, to stderr. */
static void SC_NORETURN SC_PRINTF(3, 4)
daemon_fatal(struct daemon *d, int code, const char *fmt, ...)
{
	va_list ap;
	char *msg;

	va_start(ap, fmt);
	if (vasprintf(&msg, fmt, ap) == -1)
		msg = NULL;
	va_end(ap);
	log_crit("%s", msg != NULL ? msg : fmt);
	if (!d->main->log_stderr)
		fprintf(stderr, "stopcockd: %s\n", msg != NULL ? msg : fmt);
	free(msg);
	exit(code);
}

/* What the daemon needs beyond what conf_load checks. */
static int
daemon_check(const struct conf *conf, char **cause)
{
	return conf_check_daemon(conf, cause);
}

/* Log a multi-line cause one line at a time. */
static void
daemon_log_lines(const char *prefix, const char *text)
{
	const char *p = text, *nl;

	while (*p != '\0') {
		nl = strchr(p, '\n');
		log_warnx("%s%.*s", prefix, nl != NULL ? (int)(nl - p) :
		    (int)strlen(p), p);
		if (nl == NULL)
			break;
		p = nl + 1;
	}
}

static void
daemon_timer(struct event *ev, double seconds)
{
	struct timeval tv;

	if (seconds < 0.001)
		seconds = 0.001;
	tv.tv_sec = (time_t)seconds;
	tv.tv_usec = (suseconds_t)((seconds - tv.tv_sec) * 1e6);
	event_add(ev, &tv);
}

static void
daemon_checkpoint(struct daemon *d, const char *why)
{
	dispatch_drain(d->dispatch);	/* the alerts of the state saved */
	ckpt_start(d, why);
}

static int
daemon_differs(const char *a, const char *b)
{
	if (a == NULL || b == NULL)
		return a != b;
	return strcmp(a, b) != 0;
}

/*
 * The mixture parameters are fixed before monitoring from the
 * configuration and never retuned from the data; say which, once per
 * guardrail, whenever a configuration comes into force.
 */
static void
daemon_log_tuning(struct daemon *d)
{
	json_t *t = engine_json_tuning(d->engine), *g;
	char *line;
	size_t i;

	log_info("tuning (two-arm experiment): srm_concentration=%.6g "
	    "family=%lld", json_real_value(json_object_get(t,
	    "srm_concentration")), json_integer_value(json_object_get(t,
	    "family")));
	json_array_foreach(json_object_get(t, "guardrails"), i, g) {
		line = json_dumps(g, JSON_COMPACT | JSON_REAL_PRECISION(6));
		if (line != NULL)
			log_info("tuning %s", line);
		free(line);
	}
	json_decref(t);
}

/* Settings copied at start: say which changes wait for a restart. */
static void
daemon_reload_notes(const struct conf *old, const struct conf *new)
{
	static const struct {
		const char	*name;
		size_t		 off;
	} fixed[] = {
		{ "[daemon] tcp", offsetof(struct conf, tcp) },
		{ "[daemon] udp", offsetof(struct conf, udp) },
		{ "[daemon] unix", offsetof(struct conf, unix_path) },
		{ "[daemon] http", offsetof(struct conf, http) },
		{ "[daemon] state", offsetof(struct conf, state_dir) },
		{ "[redis] address", offsetof(struct conf, redis_address) },
		{ "[redis] stream", offsetof(struct conf, redis_stream) },
		{ "[redis] group", offsetof(struct conf, redis_group) },
		{ "[redis] consumer", offsetof(struct conf, redis_consumer) },
		{ "[redis] dead_letter",
		    offsetof(struct conf, redis_dead_letter) },
		{ "[kafka] brokers", offsetof(struct conf, kafka_brokers) },
		{ "[kafka] topic", offsetof(struct conf, kafka_topic) },
		{ "[kafka] group", offsetof(struct conf, kafka_group) },
		{ "[kafka] state_topic",
		    offsetof(struct conf, kafka_state_topic) },
		{ "[kafka] client_id", offsetof(struct conf, kafka_client_id) },
		{ "[kafka] instance_id",
		    offsetof(struct conf, kafka_instance_id) },
		{ "[syslog] ident", offsetof(struct conf, syslog_ident) },
		{ "[syslog] facility", offsetof(struct conf, syslog_facility) },
		{ "[alertmanager] url", offsetof(struct conf, am_url) },
		{ "[daemon] unix_group", offsetof(struct conf, unix_group) },
	};
	size_t i;
	int j, same;

	for (i = 0; i < SC_NELEM(fixed); i++) {
		const char *a = *(char *const *)((const char *)old +
		    fixed[i].off);
		const char *b = *(char *const *)((const char *)new +
		    fixed[i].off);

		if (daemon_differs(a, b))
			log_warnx("reload: %s changed; it takes effect at the "
			    "next restart", fixed[i].name);
	}
	/* The receivers are built at start; syslog and Alertmanager kinds
	 * and the runbook are read afresh for each alert. */
	same = old->nwebhooks == new->nwebhooks;
	for (j = 0; same && j < old->nwebhooks; j++)
		same = strcmp(old->webhooks[j].name, new->webhooks[j].name) ==
		    0 && !daemon_differs(old->webhooks[j].url,
		    new->webhooks[j].url) && !daemon_differs(
		    old->webhooks[j].secret, new->webhooks[j].secret) &&
		    old->webhooks[j].kinds == new->webhooks[j].kinds &&
		    old->webhooks[j].timeout == new->webhooks[j].timeout &&
		    old->webhooks[j].max_attempts ==
		    new->webhooks[j].max_attempts &&
		    old->webhooks[j].queue == new->webhooks[j].queue;
	if (!same)
		log_warnx("reload: [webhook] sections changed; they take "
		    "effect at the next restart");
	/* set at bind; the producers, their secrets and the inputs'
	 * signed and trusted keys apply at once (auth_configure) */
	if (old->unix_mode != new->unix_mode)
		log_warnx("reload: [daemon] unix_mode changed; it takes effect "
		    "at the next restart");
	if (old->am_resend != new->am_resend ||
	    old->remind_every != new->remind_every)
		log_warnx("reload: [alerts] remind or [alertmanager] resend "
		    "changed; it takes effect at the next restart");
}

/* SIGHUP: the new file replaces the old one entirely or not at all. */
static void
daemon_reload(struct daemon *d)
{
	struct conf *nc = NULL, *old;
	char *cause = NULL;
	double tick, every;

	notify_send(d->notify, "RELOADING=1");
	log_info("reload: reading path=%s", d->main->conf_path);
	if (conf_load(d->main->conf_path, &nc, &cause) != 0 ||
	    daemon_check(nc, &cause) != 0) {
		daemon_log_lines("reload: ", cause);
		log_warnx("reload: failed; keeping the running configuration");
		goto done;
	}
	if (engines_reconfigure(d, nc, &cause) != 0) {
		daemon_log_lines("reload: engine: ", cause);
		log_warnx("reload: failed; keeping the running configuration");
		goto done;
	}
	/* secret files were read by daemon_check just now; one that
	 * changed since is refused here, the old keys kept */
	if (auth_configure(d->auth, nc, &cause) != 0) {
		daemon_log_lines("reload: ", cause);
		log_warnx("reload: producers' secrets kept from before");
		free(cause);
		cause = NULL;
	}
	daemon_reload_notes(d->conf, nc);
	tick = d->conf->tick;
	every = d->conf->checkpoint_every;
	old = d->conf;
	d->conf = nc;
	nc = NULL;
	conf_free(old);
	if (d->conf->tick != tick)
		daemon_timer(d->main->ev_tick, d->conf->tick);
	if (d->conf->checkpoint_every != every)
		daemon_timer(d->main->ev_checkpoint, d->conf->checkpoint_every);
	log_info("reload: configuration in force path=%s guardrails=%d "
	    "experiments=%d", d->main->conf_path, d->conf->nguardrails,
	    d->conf->nexperiments);
	daemon_log_tuning(d);
done:
	if (nc != NULL)
		conf_free(nc);
	free(cause);
	notify_send(d->notify, "READY=1");
}

/* SIGTERM/SIGINT: stop the inputs, apply what they hold, save, leave. */
static void
daemon_shutdown(struct daemon *d, int sig)
{
	char *cause = NULL;

	if (d->draining) {
		log_info("shutdown already under way");
		return;
	}
	d->draining = 1;
	notify_send(d->notify, "STOPPING=1");
	log_info("shutting down signal=%s", strsignal(sig));
	if (d->redis != NULL)
		redis_in_stop(d->redis);
	kafka_in_stop(d->kafka);
	if (d->listen != NULL)
		listen_drain(d->listen);
	dispatch_drain(d->dispatch);
	if (!redis_lease_may_checkpoint(redis_in_lease(d->redis)))
		/* A standby's state is not the group's: the holder's is. */
		log_info("no final checkpoint: this daemon is a standby "
		    "(another holds the Redis lease)");
	else if (ckpt_write(d, &cause) != 0) {
		log_crit("final checkpoint failed: %s", cause);
		free(cause);
		d->main->exit_code = SC_EX_IOERR;
	} else
		log_info("final checkpoint written records=%" PRIu64,
		    ingest_records_total(d));
	event_base_loopexit(d->base, NULL);
}

static void
daemon_signal_cb(evutil_socket_t sig, short what, void *arg)
{
	struct daemon *d = arg;

	switch (sig) {
	case SIGTERM:
	case SIGINT:
		daemon_shutdown(d, (int)sig);
		break;
	case SIGHUP:
		pause_reopen(d->pause);	/* the audit log, after rotation */
		daemon_reload(d);
		break;
	case SIGUSR1:
		daemon_checkpoint(d, "signal");
		break;
	default:
		log_warnx("unexpected signal %d", (int)sig);
		break;
	}
}

static void
daemon_tick_cb(evutil_socket_t fd, short what, void *arg)
{
	struct daemon *d = arg;

	engines_tick(d, daemon_now());
	retire_idle(d);
}

static void
daemon_checkpoint_cb(evutil_socket_t fd, short what, void *arg)
{
	struct daemon *d = arg;

	if (!d->draining &&
	    redis_lease_may_checkpoint(redis_in_lease(d->redis)))
		daemon_checkpoint(d, "timer");
}

static void
daemon_watchdog_cb(evutil_socket_t fd, short what, void *arg)
{
	struct daemon *d = arg;

	notify_send(d->notify, "WATCHDOG=1");
}

/* STATUS= for systemctl status: ingest rate and Redis lag. */
static void
daemon_status_cb(evutil_socket_t fd, short what, void *arg)
{
	struct daemon *d = arg;
	struct daemon_main *m = d->main;
	struct engine_counters ec;
	uint64_t total = ingest_records_total(d);
	double now = daemon_now(), dt = now - m->status_time;
	int64_t lag = d->redis != NULL ? redis_in_lag(d->redis) : -1;
	char lagbuf[32];

	if (dt > 0)
		m->ingest_rate = (double)(total - m->status_records) / dt;
	m->status_records = total;
	m->status_time = now;
	engines_counters(d, &ec);
	if (d->redis == NULL)
		strcpy(lagbuf, "no redis");
	else if (lag < 0)
		strcpy(lagbuf, "redis lag unknown");
	else
		snprintf(lagbuf, sizeof lagbuf, "redis lag %" PRId64, lag);
	notify_retry(d->notify);
	notify_send(d->notify, "STATUS=%.0f records/s, %s, %u "
	    "experiments, "
	    "%" PRIu64 " records", m->ingest_rate, lagbuf, ec.experiments,
	    total);
}

static struct event *
daemon_every(struct daemon *d, event_callback_fn cb, double seconds)
{
	struct event *ev;

	ev = event_new(d->base, -1, EV_PERSIST, cb, d);
	if (ev == NULL)
		daemon_fatal(d, SC_EX_OSERR, "cannot create a timer");
	daemon_timer(ev, seconds);
	return ev;
}

static void
daemon_hashkey(struct daemon *d)
{
	size_t got = 0;
	ssize_t n;

	while (got < sizeof d->hashkey) {
		n = getrandom(d->hashkey + got, sizeof d->hashkey - got, 0);
		if (n == -1) {
			if (errno == EINTR)
				continue;
			daemon_fatal(d, SC_EX_OSERR, "getrandom: %s",
			    strerror(errno));
		}
		got += (size_t)n;
	}
}

static void
daemon_state_dir(struct daemon *d)
{
	struct stat st;

	if (stat(d->state_dir, &st) != 0) {
		if (errno != ENOENT || mkdir(d->state_dir, 0750) != 0)
			daemon_fatal(d, SC_EX_OSERR, "state directory %s: %s",
			    d->state_dir, strerror(errno));
		log_info("created the state directory path=%s", d->state_dir);
	} else if (!S_ISDIR(st.st_mode))
		daemon_fatal(d, SC_EX_OSERR, "state directory %s: not a "
		    "directory", d->state_dir);
	if (access(d->state_dir, W_OK | X_OK) != 0)
		daemon_fatal(d, SC_EX_OSERR, "state directory %s: %s",
		    d->state_dir, strerror(errno));
}

/*
 * Outputs first (alerts need webhooks and pause), then the state from the
 * checkpoint, then the inputs. A NULL without a cause is a subsystem
 * not built yet.
 */
static void
daemon_start(struct daemon *d)
{
	char *cause = NULL;
	uint64_t usec;
	size_t i;

	d->webhook = webhook_new(d, &cause);
	if (d->webhook == NULL && cause != NULL)
		daemon_fatal(d, SC_EX_CONFIG, "webhooks: %s", cause);
	d->pause = pause_new(d, &cause);
	if (d->pause == NULL && cause != NULL)
		daemon_fatal(d, SC_EX_CONFIG, "pause: %s", cause);
	d->alert = alert_new(d, &cause);
	if (d->alert == NULL && cause != NULL)
		daemon_fatal(d, SC_EX_CONFIG, "alerts: %s", cause);
	d->dispatch = dispatch_new(d);
	d->engines = engines_new();

	if (ckpt_restore(d, &cause) != 0)
		daemon_fatal(d, SC_EX_DATAERR, "%s; refusing to start (move "
		    "the file away to start afresh)", cause);
	if (alert_start_journal(d->alert, d->state_dir, &cause) != 0)
		daemon_fatal(d, SC_EX_OSERR, "alerts: %s", cause);
	/* Under Kafka the partitions' engines hold the experiments; the
	 * main one only plans made over HTTP, no copies of the configured. */
	if (d->engine == NULL)
		d->engine = d->conf->kafka_brokers != NULL ?
		    engine_new_shard(d->conf, d->hashkey) :
		    engine_new(d->conf, d->hashkey);
	engine_set_sink(d->engine, dispatch_finding, d->dispatch);

	d->http = http_new(d, &cause);
	if (d->http == NULL && cause != NULL)
		daemon_fatal(d, SC_EX_OSERR, "http: %s", cause);
	if (d->conf->tcp != NULL || d->conf->udp != NULL ||
	    d->conf->unix_path != NULL) {
		d->listen = listen_new(d, &cause);
		if (d->listen == NULL)
			daemon_fatal(d, SC_EX_OSERR, "listen: %s", cause);
	}
	if (d->conf->redis_address != NULL) {
		d->redis = redis_in_new(d, d->restored_redis_id, &cause);
		if (d->redis == NULL)
			daemon_fatal(d, SC_EX_CONFIG, "redis: %s", cause);
	}
	if (d->conf->kafka_brokers != NULL) {
		d->kafka = kafka_in_new(d, &cause);
		if (d->kafka == NULL)
			daemon_fatal(d, SC_EX_CONFIG, "kafka: %s", cause);
	}

	for (i = 0; i < SC_NELEM(daemon_signals); i++) {
		d->main->ev_signal[i] = evsignal_new(d->base, daemon_signals[i],
		    daemon_signal_cb, d);
		if (d->main->ev_signal[i] == NULL ||
		    event_add(d->main->ev_signal[i], NULL) != 0)
			daemon_fatal(d, SC_EX_OSERR, "cannot watch signal %d",
			    daemon_signals[i]);
	}
	d->main->ev_tick = daemon_every(d, daemon_tick_cb, d->conf->tick);
	d->main->ev_checkpoint = daemon_every(d, daemon_checkpoint_cb,
	    d->conf->checkpoint_every);
	d->main->status_time = daemon_now();
	d->main->status_records = ingest_records_total(d);
	d->main->ev_status = daemon_every(d, daemon_status_cb,
	    DAEMON_STATUS_EVERY);
	if (sd_watchdog_enabled(0, &usec) > 0) {
		d->main->ev_watchdog = daemon_every(d, daemon_watchdog_cb,
		    usec / 2e6);
		log_info("systemd watchdog every %.1fs", usec / 2e6);
	}
}

static void
daemon_stop(struct daemon *d)
{
	size_t i;

	ckpt_free(d);	/* a writer still running ends first */
	for (i = 0; i < SC_NELEM(d->main->ev_signal); i++)
		if (d->main->ev_signal[i] != NULL)
			event_free(d->main->ev_signal[i]);
	if (d->main->ev_tick != NULL)
		event_free(d->main->ev_tick);
	if (d->main->ev_checkpoint != NULL)
		event_free(d->main->ev_checkpoint);
	if (d->main->ev_status != NULL)
		event_free(d->main->ev_status);
	if (d->main->ev_watchdog != NULL)
		event_free(d->main->ev_watchdog);
	redis_in_free(d->redis);
	kafka_in_free(d->kafka);
	listen_free(d->listen);
	http_free(d->http);
	dispatch_free(d->dispatch);	/* before the outputs it feeds */
	alert_free(d->alert);
	pause_free(d->pause);
	webhook_free(d->webhook);
	notify_free(d->notify);
	engines_free(d->engines);
	engine_free(d->engine);
	conf_free(d->conf);
	event_base_free(d->base);
	free(d->main->conf_path);
	auth_free(d->auth);
	ingest_free(d->ingest);
	free(d->state_dir);
	free(d->restored_redis_id);
	free(d->restored_redis_stream);
}

int
main(int argc, char **argv)
{
	struct daemon daemon, *d = &daemon;
	struct daemon_main dmain;
	const char *path = DAEMON_CONF;
	char *cause = NULL;
	int ch, check = 0, code;

	memset(d, 0, sizeof *d);
	memset(&dmain, 0, sizeof dmain);
	d->main = &dmain;
	if (argc == 2 && strcmp(argv[1], "--version") == 0) {
		printf("stopcockd %s\n", STOPCOCK_VERSION);
		return SC_EX_OK;
	}
	while ((ch = getopt(argc, argv, "c:dfht")) != -1) {
		switch (ch) {
		case 'c':
			path = optarg;
			break;
		case 'd':
			d->main->debug = 1;
			d->main->log_stderr = 1;
			break;
		case 'f':
			/* Always in the foreground; -f only keeps the log
			 * on stderr (journald reads it there too). */
			d->main->log_stderr = 1;
			break;
		case 'h':
			daemon_options(stdout);
			printf("\nconfiguration keys:\n");
			conf_help(stdout);
			return SC_EX_OK;
		case 't':
			check = 1;
			break;
		default:
			daemon_usage();
		}
	}
	if (optind != argc)
		daemon_usage();

	if (conf_load(path, &d->conf, &cause) != 0 ||
	    daemon_check(d->conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		if (check)
			fprintf(stderr, "configuration has errors\n");
		free(cause);
		conf_free(d->conf);
		return SC_EX_CONFIG;
	}
	if (check) {
		printf("configuration OK\n");
		conf_free(d->conf);
		return SC_EX_OK;
	}
	d->log_stderr = d->main->log_stderr;
	if (log_init(d->conf->syslog_ident != NULL ? d->conf->syslog_ident :
	    "stopcockd", d->conf->syslog_facility, d->main->log_stderr,
	    d->main->debug) != 0) {
		fprintf(stderr, "stopcockd: unknown syslog facility %s\n",
		    d->conf->syslog_facility);
		return SC_EX_CONFIG;
	}
	/* A peer that goes away must cost an EPIPE, not the process. */
	signal(SIGPIPE, SIG_IGN);

	d->main->conf_path = xstrdup(path);
	d->ingest = ingest_new();
	if ((d->auth = auth_new(d, &cause)) == NULL) {
		fprintf(stderr, "stopcockd: %s\n", cause);
		free(cause);
		return SC_EX_CONFIG;
	}
	d->state_dir = xstrdup(d->conf->state_dir);
	d->started = daemon_now();
	daemon_hashkey(d);
	if ((d->base = event_base_new()) == NULL)
		daemon_fatal(d, SC_EX_OSERR, "cannot create the event loop");
	d->notify = notify_new();
	daemon_state_dir(d);
	daemon_start(d);

	log_info("stopcockd ready pid=%ld config=%s state=%s records=%" PRIu64,
	    (long)getpid(), d->main->conf_path, d->state_dir,
	    ingest_records_total(d));
	daemon_log_tuning(d);
	notify_send(d->notify, "READY=1\nSTATUS=running");

	if (event_base_dispatch(d->base) == -1)
		daemon_fatal(d, SC_EX_SOFTWARE, "event loop failed");
	code = d->main->exit_code;
	log_info("stopcockd exiting code=%d", code);
	daemon_stop(d);
	return code;
}
