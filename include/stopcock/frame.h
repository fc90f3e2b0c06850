/*
 * frame.h: signed batches of records from named producers. On a stream
 * or datagram input that requires signatures, records arrive in frames:
 *
 *   batch PRODUCER MSGID TS LENGTH v1,SIGNATURE\n
 *   LENGTH bytes of record lines (the body; its last newline optional)
 *
 * PRODUCER is a [producer NAME] of the configuration, MSGID 1-64 of
 * [A-Za-z0-9._:-] chosen by the producer and never reused, TS unix
 * seconds (decimal, no sign or leading zero), LENGTH the body's bytes in
 * decimal (at most FRAME_BODY_MAX) and SIGNATURE the Standard Webhooks
 * signature of the body: base64(HMAC-SHA256(key, MSGID "." TS "." body))
 * (sign.h). Redis entries and Kafka messages carry the same four values
 * beside the records, as fields or headers.
 *
 * frame_parse is pure and allocation-free. A producer (frame_producer)
 * holds its keys (several, for rotation) and the set of message ids it
 * used recently; frame_check is the verdict on one batch.
 */
#ifndef STOPCOCK_FRAME_H
#define STOPCOCK_FRAME_H

#include <stddef.h>
#include <stdint.h>

#include "stopcock/proto.h"
#include "stopcock/sign.h"

#define FRAME_KEYWORD	"batch "	/* how a header line begins */
#define FRAME_KEYWORD_LEN 6
#define FRAME_BODY_MAX	65536	/* bytes of records in one batch */
#define FRAME_HEADER_MAX 256	/* bytes of a header line, newline included */
#define FRAME_ID_MAX	64	/* bytes of a message id */
#define FRAME_TS_DIGITS	12	/* digits of a timestamp (year 33658) */
#define FRAME_KEYS_MAX	4	/* secrets of one producer at once */
/*
 * Message ids remembered per producer: the window starts at
 * FRAME_REPLAY_IDS_MIN and doubles, up to FRAME_REPLAY_IDS, when it is
 * full (24 bytes an id with its index: 1.5 MiB at most per producer).
 * Forgetting an id raises the floor to its stamp, refusing every later
 * batch stamped in the same second: a window of 4096 refused a producer's
 * 4097th batch of one second (bench/ingest.py's signed TCP sends about
 * 10,000 of 60 KB a second), so it grows to hold 65,536 a second.
 */
#define FRAME_REPLAY_IDS_MIN 4096
#define FRAME_REPLAY_IDS 65536

enum frame_status {
	FRAME_OK,		/* header and body complete */
	FRAME_PARTIAL,		/* more bytes needed (f->header_len set once
				 * the header is read) */
	FRAME_E_MALFORMED,	/* not a header line, or a bad field */
	FRAME_E_LONG		/* LENGTH over FRAME_BODY_MAX */
};

struct frame {
	char		producer[PROTO_NAME_MAX + 1];
	char		id[FRAME_ID_MAX + 1];
	size_t		id_len;
	long long	ts;
	size_t		body_len;
	char		sig[SIGN_SIG_MAX];
	size_t		sig_len;
	size_t		header_len;	/* bytes up to and with the newline */
};

/*
 * Parse the frame at the start of p[0..len). FRAME_E_* with
 * f->header_len the bytes of the bad header line up to and with its
 * newline (0: no newline within FRAME_HEADER_MAX bytes).
 */
enum frame_status frame_parse(const char *p, size_t len, struct frame *f);
/* Parse the four values a Redis entry or Kafka message carries beside
 * its body (body_len given); FRAME_OK or FRAME_E_*. */
enum frame_status frame_fields(const char *producer, size_t plen,
		    const char *id, size_t idlen, const char *ts, size_t tslen,
		    const char *sig, size_t siglen, size_t body_len,
		    struct frame *f);
/* 1 when p[0..len) begins with the keyword of a header line. */
int		 frame_is_header(const char *p, size_t len);

/* What frame_check decides about one batch. */
enum frame_verdict {
	FRAME_ACCEPT,
	FRAME_BAD_SIGNATURE,	/* no key of the producer gives it */
	FRAME_STALE,		/* TS further than the tolerance from now */
	FRAME_REPLAYED		/* MSGID seen, or older than the ids kept */
};

struct frame_producer;

/* hashkey keys the hash of remembered ids (SipHash-2-4). */
struct frame_producer *frame_producer_new(const char *name,
		    const uint8_t hashkey[16]);
void		 frame_producer_free(struct frame_producer *);
const char	*frame_producer_name(const struct frame_producer *);
/* Add a "whsec_" secret; 0, or -1 with *cause (bad secret, too many). */
int		 frame_producer_add_key(struct frame_producer *,
		    const char *secret, char **cause);
int		 frame_producer_nkeys(const struct frame_producer *);
/* Replace dst's keys with src's (a reload: dst keeps its ids). */
void		 frame_producer_take_keys(struct frame_producer *dst,
		    const struct frame_producer *src);
/*
 * Verify one batch against the producer at time now (unix seconds),
 * allowing tolerance seconds either way. An accepted batch's id is
 * remembered: of FRAME_REPLAY_IDS ids (a window that grows to that from
 * FRAME_REPLAY_IDS_MIN) the oldest is forgotten first, and from then on
 * no batch stamped at or before a forgotten one is accepted, so a replay
 * is refused even after its id is forgotten.
 */
enum frame_verdict frame_check(struct frame_producer *, const struct frame *,
		    const char *body, double now, double tolerance);
/*
 * The floor for a checkpoint: no batch stamped at or before it may be
 * accepted again (the newest accepted or forgotten stamp). A restored
 * producer refuses every batch at or before the saved floor, since its
 * remembered ids are not saved.
 */
long long	 frame_producer_floor(const struct frame_producer *);
void		 frame_producer_set_floor(struct frame_producer *, long long);
const char	*frame_verdict_reason(enum frame_verdict);

#endif
