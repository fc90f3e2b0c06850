/*
 * sketchprobe: feed a file of native-endian float64 samples to a sketch
 * and print its quantiles, for tests/ref/sketch_numpy.py to compare with
 * numpy's exact order statistics. The sketch also goes through
 * sketch_encode/sketch_decode and the decoded copy is queried too, so the
 * checkpoint path sees 10^6-sample sketches.
 *
 *   sketchprobe ACCURACY MAX_BUCKETS FILE Q...
 *
 * Output: "count N", "nbuckets B", "bytes M", then per Q
 * "q Q ESTIMATE DECODED_ESTIMATE".
 */
#include <stdio.h>
#include <stdlib.h>

#include "stopcock/sketch.h"
#include "stopcock/util.h"

int
main(int argc, char **argv)
{
	struct sketch *s, *d;
	double accuracy, q, x[4096];
	uint64_t buckets;
	uint8_t *buf;
	size_t n, i, len;
	FILE *f;
	int a;

	if (argc < 5 || parse_double(argv[1], 0, 1, &accuracy) != 0 ||
	    parse_u64(argv[2], UINT32_MAX, &buckets) != 0) {
		fprintf(stderr, "usage: sketchprobe ACCURACY MAX_BUCKETS FILE "
		    "Q...\n");
		return SC_EX_USAGE;
	}
	if ((s = sketch_new(accuracy, (uint32_t)buckets)) == NULL) {
		fprintf(stderr, "sketchprobe: bad accuracy or bucket count\n");
		return SC_EX_USAGE;
	}
	if ((f = fopen(argv[3], "rb")) == NULL) {
		perror(argv[3]);
		return SC_EX_NOINPUT;
	}
	while ((n = fread(x, sizeof x[0], 4096, f)) > 0) {
		for (i = 0; i < n; i++) {
			if (sketch_add(s, x[i], 1) != 0) {
				fprintf(stderr, "sketchprobe: bad sample\n");
				return SC_EX_DATAERR;
			}
		}
	}
	if (ferror(f)) {
		perror(argv[3]);
		return SC_EX_IOERR;
	}
	fclose(f);

	len = sketch_encoded_size(s);
	buf = xmalloc(len);
	if (sketch_encode(s, buf, len) != len ||
	    (d = sketch_decode(buf, len)) == NULL) {
		fprintf(stderr, "sketchprobe: encode/decode failed\n");
		return SC_EX_SOFTWARE;
	}
	printf("count %llu\n", (unsigned long long)sketch_count(s));
	printf("nbuckets %zu\n", sketch_nbuckets(s));
	printf("bytes %zu\n", sketch_bytes(s));
	for (a = 4; a < argc; a++) {
		if (parse_double(argv[a], 0, 1, &q) != 0) {
			fprintf(stderr, "sketchprobe: bad quantile %s\n",
			    argv[a]);
			return SC_EX_USAGE;
		}
		printf("q %s %.17g %.17g\n", argv[a], sketch_quantile(s, q),
		    sketch_quantile(d, q));
	}
	free(buf);
	sketch_free(d);
	sketch_free(s);
	return 0;
}
