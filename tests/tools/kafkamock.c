/*
 * kafkamock: a Kafka cluster for the integration tests, built on
 * librdkafka's mock cluster (rdkafka_mock.h): real brokers on loopback
 * that speak the Kafka protocol, with consumer groups and transactions,
 * living inside this process. There is no Kafka broker in Debian and no
 * Python Kafka client, so this tool is both the cluster and the
 * producer the tests drive.
 *
 *   kafkamock [-b brokers] -t topic:partitions [-t ...]
 *
 * It creates the topics, prints "bootstrap HOST:PORT,..." and then reads
 * commands from stdin, one a line, answering each on stdout:
 *
 *   msg KEY N      the next N lines are one message value (joined with
 *                  newlines), produced to the first topic with KEY;
 *                  "ok"
 *   hmsg KEY N PRODUCER ID TS SIGNATURE
 *                  the same, with headers producer, id, ts and signature
 *                  (a signed batch; "-" leaves one header out); "ok"
 *   flush          wait for every message; "flushed DELIVERED FAILED"
 *   down ID, up ID take broker ID (1-based) down or up; "ok"
 *   bounce ID MS   take broker ID down now and up again MS ms later
 *                  (from a thread, so commands keep flowing); "ok"
 *   commit GROUP PARTITION OFFSET
 *                  commit OFFSET for the first topic's PARTITION in
 *                  GROUP (as a member-less client), with no state: the
 *                  case a daemon must refuse; "ok" or "error ..."
 *   quit (or EOF)  flush and exit
 *
 * The producer keeps the contract the README asks of real producers:
 * the message key is the experiment id, partitioner murmur2_random (the
 * Java client's partitioner, so every client agrees on a key's
 * partition), acks=all and idempotence.
 */
#include <errno.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <librdkafka/rdkafka.h>
#include <librdkafka/rdkafka_mock.h>

#define KM_TOPICS_MAX 8
#define KM_LINE_MAX 65536
#define KM_VALUE_MAX (16 << 20)

static uint64_t km_delivered, km_failed;

static void
km_die(const char *what, const char *why)
{
	fprintf(stderr, "kafkamock: %s: %s\n", what, why);
	exit(1);
}

static void
km_set(rd_kafka_conf_t *conf, const char *key, const char *value)
{
	char err[512];

	if (rd_kafka_conf_set(conf, key, value, err, sizeof err) !=
	    RD_KAFKA_CONF_OK)
		km_die(key, err);
}

static void
km_dr(rd_kafka_t *rk, const rd_kafka_message_t *m, void *opaque)
{
	if (m->err != 0) {
		km_failed++;
		fprintf(stderr, "kafkamock: delivery failed: %s\n",
		    rd_kafka_err2str(m->err));
	} else
		km_delivered++;
}

/* Strip the line terminator; -1 at EOF. */
static int
km_getline(char *buf, size_t size)
{
	size_t n;

	if (fgets(buf, (int)size, stdin) == NULL)
		return -1;
	n = strlen(buf);
	if (n > 0 && buf[n - 1] == '\n')
		buf[--n] = '\0';
	return 0;
}

static void
km_flush(rd_kafka_t *p)
{
	rd_kafka_resp_err_t err;

	while ((err = rd_kafka_flush(p, 1000)) == RD_KAFKA_RESP_ERR__TIMED_OUT)
		;
	printf("flushed %llu %llu\n", (unsigned long long)km_delivered,
	    (unsigned long long)km_failed);
	fflush(stdout);
}

struct km_bounce {
	rd_kafka_mock_cluster_t *mc;
	int		 broker;
	int		 ms;
};

static void *
km_bounce_run(void *arg)
{
	struct km_bounce *b = arg;

	usleep((useconds_t)b->ms * 1000);
	rd_kafka_mock_broker_set_up(b->mc, b->broker);
	free(b);
	return NULL;
}

static void
km_bounce(rd_kafka_mock_cluster_t *mc, int broker, int ms)
{
	struct km_bounce *b = malloc(sizeof *b);
	pthread_t t;

	if (b == NULL)
		km_die("malloc", strerror(errno));
	b->mc = mc;
	b->broker = broker;
	b->ms = ms;
	rd_kafka_mock_broker_set_down(mc, broker);
	if (pthread_create(&t, NULL, km_bounce_run, b) != 0)
		km_die("pthread_create", "failed");
	pthread_detach(t);
}

/* Commit an offset for group as a simple (unsubscribed) consumer. */
static void
km_commit(const char *bootstrap, const char *topic, const char *group,
    int partition, long long offset)
{
	rd_kafka_conf_t *conf = rd_kafka_conf_new();
	rd_kafka_topic_partition_list_t *l;
	rd_kafka_resp_err_t err;
	rd_kafka_t *c;
	char errstr[512];

	km_set(conf, "bootstrap.servers", bootstrap);
	km_set(conf, "group.id", group);
	km_set(conf, "enable.auto.commit", "false");
	km_set(conf, "log_level", "3");
	if ((c = rd_kafka_new(RD_KAFKA_CONSUMER, conf, errstr,
	    sizeof errstr)) == NULL)
		km_die("rd_kafka_new", errstr);
	l = rd_kafka_topic_partition_list_new(1);
	rd_kafka_topic_partition_list_add(l, topic, partition)->offset = offset;
	err = rd_kafka_commit(c, l, 0);
	rd_kafka_topic_partition_list_destroy(l);
	if (err != 0)
		printf("error %s\n", rd_kafka_err2str(err));
	else
		printf("ok\n");
	rd_kafka_destroy(c);
}

int
main(int argc, char **argv)
{
	rd_kafka_conf_t *conf;
	rd_kafka_t *holder, *p;
	rd_kafka_mock_cluster_t *mc;
	rd_kafka_resp_err_t err;
	char errstr[512], *line, *value, *colon, key[512], group[512];
	static const char *const hn[4] = { "producer", "id", "ts",
	    "signature" };
	char hv[4][128];
	rd_kafka_headers_t *hdrs;
	long long offset;
	const char *topics[KM_TOPICS_MAX];
	int parts[KM_TOPICS_MAX], ntopics = 0, nbrokers = 3, ch, i, n;
	size_t vlen, len;

	while ((ch = getopt(argc, argv, "b:t:")) != -1) {
		switch (ch) {
		case 'b':
			nbrokers = atoi(optarg);
			break;
		case 't':
			if (ntopics == KM_TOPICS_MAX ||
			    (colon = strrchr(optarg, ':')) == NULL)
				km_die("-t", "expected topic:partitions");
			*colon = '\0';
			topics[ntopics] = optarg;
			parts[ntopics++] = atoi(colon + 1);
			break;
		default:
			fprintf(stderr, "usage: kafkamock [-b brokers] "
			    "-t topic:partitions [-t ...]\n");
			return 2;
		}
	}
	if (ntopics == 0 || nbrokers < 1)
		km_die("usage", "at least one -t topic:partitions");

	/* The cluster lives in its own handle's threads. */
	conf = rd_kafka_conf_new();
	km_set(conf, "log_level", "3");
	holder = rd_kafka_new(RD_KAFKA_PRODUCER, conf, errstr, sizeof errstr);
	if (holder == NULL)
		km_die("rd_kafka_new", errstr);
	mc = rd_kafka_mock_cluster_new(holder, nbrokers);
	if (mc == NULL)
		km_die("rd_kafka_mock_cluster_new", "failed");
	for (i = 0; i < ntopics; i++) {
		err = rd_kafka_mock_topic_create(mc, topics[i], parts[i],
		    nbrokers < 3 ? nbrokers : 3);
		if (err != 0)
			km_die(topics[i], rd_kafka_err2str(err));
	}

	conf = rd_kafka_conf_new();
	km_set(conf, "bootstrap.servers",
	    rd_kafka_mock_cluster_bootstraps(mc));
	km_set(conf, "acks", "all");
	km_set(conf, "enable.idempotence", "true");
	km_set(conf, "partitioner", "murmur2_random");
	km_set(conf, "linger.ms", "5");
	km_set(conf, "log_level", "3");
	rd_kafka_conf_set_dr_msg_cb(conf, km_dr);
	p = rd_kafka_new(RD_KAFKA_PRODUCER, conf, errstr, sizeof errstr);
	if (p == NULL)
		km_die("rd_kafka_new", errstr);

	printf("bootstrap %s\n", rd_kafka_mock_cluster_bootstraps(mc));
	fflush(stdout);

	line = malloc(KM_LINE_MAX);
	value = malloc(KM_VALUE_MAX);
	if (line == NULL || value == NULL)
		km_die("malloc", strerror(errno));
	while (km_getline(line, KM_LINE_MAX) == 0) {
		hdrs = NULL;
		if (sscanf(line, "hmsg %511s %d %127s %127s %127s %127s", key,
		    &n, hv[0], hv[1], hv[2], hv[3]) == 6) {
			hdrs = rd_kafka_headers_new(4);
			for (i = 0; i < 4; i++)
				if (strcmp(hv[i], "-") != 0)
					rd_kafka_header_add(hdrs, hn[i], -1,
					    hv[i], -1);
		}
		if (hdrs != NULL || sscanf(line, "msg %511s %d", key, &n) == 2) {
			vlen = 0;
			for (i = 0; i < n; i++) {
				if (km_getline(line, KM_LINE_MAX) != 0)
					km_die("msg", "value cut short");
				len = strlen(line);
				if (vlen + len + 1 > KM_VALUE_MAX)
					km_die("msg", "value too long");
				if (i > 0)
					value[vlen++] = '\n';
				memcpy(value + vlen, line, len);
				vlen += len;
			}
			/* on success the message owns the headers */
			while ((err = hdrs != NULL ? rd_kafka_producev(p,
			    RD_KAFKA_V_TOPIC(topics[0]),
			    RD_KAFKA_V_KEY(key, strlen(key)),
			    RD_KAFKA_V_VALUE(value, vlen),
			    RD_KAFKA_V_HEADERS(hdrs),
			    RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY),
			    RD_KAFKA_V_END) : rd_kafka_producev(p,
			    RD_KAFKA_V_TOPIC(topics[0]),
			    RD_KAFKA_V_KEY(key, strlen(key)),
			    RD_KAFKA_V_VALUE(value, vlen),
			    RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_COPY),
			    RD_KAFKA_V_END)) == RD_KAFKA_RESP_ERR__QUEUE_FULL)
				rd_kafka_poll(p, 100);
			if (err != 0)
				km_die("produce", rd_kafka_err2str(err));
			rd_kafka_poll(p, 0);
			printf("ok\n");
		} else if (strcmp(line, "flush") == 0) {
			km_flush(p);
			continue;
		} else if (sscanf(line, "down %d", &n) == 1) {
			rd_kafka_mock_broker_set_down(mc, n);
			printf("ok\n");
		} else if (sscanf(line, "bounce %d %lld", &n, &offset) == 2) {
			km_bounce(mc, n, (int)offset);
			printf("ok\n");
		} else if (sscanf(line, "up %d", &n) == 1) {
			rd_kafka_mock_broker_set_up(mc, n);
			printf("ok\n");
		} else if (sscanf(line, "commit %511s %d %lld", group, &n,
		    &offset) == 3) {
			km_commit(rd_kafka_mock_cluster_bootstraps(mc),
			    topics[0], group, n, offset);
		} else if (strcmp(line, "quit") == 0)
			break;
		else
			printf("error unknown command\n");
		fflush(stdout);
	}
	km_flush(p);
	rd_kafka_destroy(p);
	rd_kafka_mock_cluster_destroy(mc);
	rd_kafka_destroy(holder);
	free(line);
	free(value);
	return 0;
}
