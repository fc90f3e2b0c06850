/*
 * engine_codec.h: the JSON codecs of an engine image's parts (reals
 * with infinities, histograms, arms, sketches, unit groups, held
 * records, the SRM ring, change detectors, a test's scalar fields),
 * which engine_image.c assembles into a whole experiment. Not for use
 * outside src/core.
 */
#ifndef STOPCOCK_ENGINE_CODEC_H
#define STOPCOCK_ENGINE_CODEC_H

#include "engine_int.h"

json_t		*engine_codec_real(double);
int		 engine_codec_get_real(const json_t *, const char *key,
		    double *out);
double		 engine_codec_at(const json_t *, size_t);
json_t		*engine_codec_hist_save(const struct hist *);
void		 engine_codec_hist_load(struct hist *, const json_t *,
		    uint32_t cap);
json_t		*engine_codec_arms_save(const struct proto_arm *, int narms);
int		 engine_codec_arms_load(const json_t *, struct proto_arm *,
		    int *narms);
json_t		*engine_codec_sketch_save(const struct sketch *);
struct sketch	*engine_codec_sketch_load(const char *b64);
json_t		*engine_codec_groups_save(const struct groups *);
int		 engine_codec_groups_load(struct series *, const json_t *,
		    uint32_t groups_max);
json_t		*engine_codec_held_save(const struct heldq *);
int		 engine_codec_held_load(struct experiment *, struct series *,
		    const json_t *);
json_t		*engine_codec_srm_ring_save(const struct experiment *);
int		 engine_codec_srm_ring_load(struct experiment *,
		    const json_t *rows);
json_t		*engine_codec_reals_save(const double *, size_t);
int		 engine_codec_reals_load(const json_t *, double *, size_t);
json_t		*engine_codec_change_save(const struct test *);
int		 engine_codec_change_load(struct test *, const json_t *);
void		 engine_codec_fields_save(json_t *to, const struct test *);
void		 engine_codec_fields_load(const json_t *, struct test *);

#endif
