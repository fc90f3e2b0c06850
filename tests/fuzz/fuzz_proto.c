/*
 * fuzz_proto.c: libFuzzer target for the event protocol parser. Any bytes
 * must give a status in range, never a crash or a read past len; an
 * accepted record must format to a line that parses back to OK with the
 * same kind, experiment and attributes (unit=, epoch=).
 */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/proto.h"

int LLVMFuzzerTestOneInput(const uint8_t *, size_t);

int
LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	struct record r, r2;
	char buf[PROTO_LINE_MAX * 2];
	char *copy;
	enum proto_status st;
	int n;

	/* An exact-size heap copy, so ASan sees any read past the end. */
	copy = malloc(size ? size : 1);
	if (copy == NULL)
		return 0;
	memcpy(copy, data, size);
	st = proto_parse(copy, size, &r);
	free(copy);
	if ((unsigned)st >= PROTO_NSTATUS)
		abort();
	if (proto_reason(st) == NULL || proto_describe(st) == NULL)
		abort();
	if (st != PROTO_OK)
		return 0;
	if (r.narms < 0 || r.narms > PROTO_PLAN_MAX)
		abort();
	if (r.unit_len > PROTO_UNIT_MAX || strlen(r.unit) != r.unit_len ||
	    r.epoch > PROTO_EPOCH_MAX ||
	    (r.kind == PROTO_PLAN && (r.unit_len != 0 || r.epoch != 0)))
		abort();
	n = proto_format(&r, buf, sizeof buf);
	if (n < 0)
		abort();
	if (proto_parse(buf, (size_t)n, &r2) != PROTO_OK || r2.kind != r.kind ||
	    strcmp(r2.experiment, r.experiment) != 0 ||
	    r2.unit_len != r.unit_len || strcmp(r2.unit, r.unit) != 0 ||
	    r2.epoch != r.epoch)
		abort();
	return 0;
}
