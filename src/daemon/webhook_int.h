/*
 * webhook_int.h: what webhook.c (receivers, signing, the curl multi
 * glue, retries) and webhook_spool.c (a receiver's queue: the spool on
 * disk, its bound, the order of deliveries) share. Not for use outside
 * them.
 */
#ifndef STOPCOCK_WEBHOOK_INT_H
#define STOPCOCK_WEBHOOK_INT_H

#include <sys/queue.h>

#include <curl/curl.h>

#include "stopcock/sign.h"
#include "daemon.h"

#define WEBHOOK_INFLIGHT_MAX	4	/* requests per healthy receiver */
#define WEBHOOK_BACKOFF_BASE	1.0	/* seconds */
#define WEBHOOK_BACKOFF_CAP	300.0
#define WEBHOOK_TIMEOUT		10.0	/* when the config gives none */
#define WEBHOOK_PROBE		5.0	/* seconds, when not configured */
#define WEBHOOK_SPOOL_BYTES	(64u * 1024 * 1024)
#define WEBHOOK_QUEUE		1000
#define WEBHOOK_SPOOL_MAX	(1024 * 1024)	/* bytes of one spool file */
#define WEBHOOK_REPLY_MAX	256	/* bytes of an answer kept for logs */

struct receiver;

struct delivery {
	TAILQ_ENTRY(delivery)	 entry;
	struct receiver		*rcv;
	uint64_t		 seq;
	char			*id;
	char			*body;
	size_t			 len;
	char			*path;		/* spool file, NULL if none */
	char			*experiment;	/* the body's, NULL if none */
	int			 attempts;
	int			 info;		/* severity info: droppable */
	CURL			*easy;
	struct curl_slist	*headers;
	char			 error[CURL_ERROR_SIZE];
	char			 reply[WEBHOOK_REPLY_MAX + 1];
	size_t			 replylen;
};
TAILQ_HEAD(deliveries, delivery);

struct receiver {
	struct webhook		*w;
	char			*name;
	char			*url;
	char			*spool;		/* directory, NULL: memory only */
	unsigned char		 key[SIGN_KEY_MAX];
	size_t			 keylen;
	int			 sign;
	int			 internal;	/* not reached by webhook_send */
	uint32_t		 kinds;		/* what webhook_send brings */
	double			 timeout;
	int			 max_attempts;	/* <= 0: unlimited */
	int			 supersede;	/* a later post repeats it */
	uint32_t		 queue_max;
	double			 backoff_cap;
	double			 probe;
	uint64_t		 spool_max;	/* bytes of bodies held */
	uint64_t		 spool_used;

	struct deliveries	 waiting;	/* oldest first */
	struct deliveries	 inflight;
	uint32_t		 nwaiting;
	uint32_t		 ninflight;
	uint32_t		 failing;	/* consecutive retryable failures */
	double			 next_try;	/* wall time */
	struct event		*wake;

	uint64_t		 sent;
	uint64_t		 failed;
	uint64_t		 dropped;
	uint64_t		 overfull;	/* kept beyond the bound */
	uint64_t		 retries;
	uint64_t		 spool_errors;
};

struct webhook {
	struct daemon		*d;
	CURLM			*multi;
	struct event		*timer;
	struct receiver		**rcv;
	int			 nrcv;
	uint64_t		 seq;
};

/* webhook.c */
void	webhook_kick(struct receiver *);
void	webhook_delivery_free(struct delivery *);

/* webhook_spool.c */
void	webhook_spool_forget(struct delivery *);
void	webhook_spool_insert(struct receiver *, struct delivery *);
void	webhook_spool_queue(struct receiver *, const char *id,
	    const char *body, size_t len, int info);
void	webhook_spool_load(struct receiver *);

#endif
