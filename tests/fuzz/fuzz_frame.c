/*
 * fuzz_frame.c: libFuzzer target for the signed-batch header parser
 * (src/core/frame.c). Any bytes must give a status whose lengths obey
 * frame.h: a complete frame lies inside the input with its body under
 * FRAME_BODY_MAX and its header naming a valid producer, id and
 * signature; a waiting frame needs more than the input holds; a bad
 * header is skipped by at most FRAME_HEADER_MAX bytes. A complete frame
 * is then verified against one producer (it must not crash, and a
 * forged signature must not pass).
 */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/frame.h"
#include "stopcock/proto.h"

int LLVMFuzzerTestOneInput(const uint8_t *, size_t);

/* base64(b"ferry-timetable-producer-key-01"), as the seeds are signed */
#define FUZZ_SECRET "whsec_ZmVycnktdGltZXRhYmxlLXByb2R1Y2VyLWtleS0wMQ=="

int
LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	static const uint8_t key[16] = { 1 };
	static struct frame_producer *fp;
	const char *p = (const char *)data;
	struct frame f;
	enum frame_status st;
	char *cause = NULL;

	if (fp == NULL) {
		fp = frame_producer_new("ferry", key);
		if (frame_producer_add_key(fp, FUZZ_SECRET, &cause) != 0)
			abort();
	}
	st = frame_parse(p, size, &f);
	switch (st) {
	case FRAME_OK:
		if (f.header_len == 0 || f.header_len > FRAME_HEADER_MAX ||
		    f.header_len + f.body_len > size ||
		    f.body_len > FRAME_BODY_MAX ||
		    !frame_is_header(p, f.header_len) ||
		    !proto_name_ok(f.producer, strlen(f.producer)) ||
		    f.id_len == 0 || f.id_len > FRAME_ID_MAX ||
		    f.sig_len != SIGN_SIG_MAX - 1 || f.ts < 0)
			abort();
		(void)frame_check(fp, &f, p + f.header_len, (double)f.ts, 300);
		break;
	case FRAME_PARTIAL:
		if (f.header_len != 0 && f.header_len + f.body_len <= size)
			abort();
		if (f.header_len == 0 && size >= FRAME_HEADER_MAX)
			abort();
		break;
	case FRAME_E_MALFORMED:
	case FRAME_E_LONG:
		if (f.header_len > size || f.header_len > FRAME_HEADER_MAX)
			abort();
		break;
	default:
		abort();
	}
	return 0;
}
