/*
 * serving_common.h
 *		Helpers shared by the serving functions.
 */
#ifndef AFFINITY_SERVING_COMMON_H
#define AFFINITY_SERVING_COMMON_H

#include "affinity_pg.h"

#include "utils/array.h"

#include "../core/interactions.h"
#include "../core/rules.h"
#include "../core/topk.h"

/* rules.c: the rules argument of top_items and the batch */
typedef struct RulesScratch
{
	float	   *work;			/* 2 * pool */
	int32	   *counts;			/* n_groups */
	float	   *row;			/* n_items, when diversity > 0 */
	uint8	   *skip;
} RulesScratch;

extern bool rules_parse(FunctionCallInfo fcinfo, int argno, const AffModelView *v, int64 k,
						AffRules *r);
extern RulesScratch *rules_scratch(const AffModelView *v, const AffRules *r);
extern int64 rules_rank(const AffServe *s, const AffRules *r, RulesScratch *sc,
						const AffScored *pool, int64 n, int64 k, AffScored *out);
extern void emit_scored(FunctionCallInfo fcinfo, const AffScored *list, int64 n,
						const AffModelView *v, bool users, const char *source);

extern const char *const affinity_source_personal;
extern const char *const affinity_source_basket;
extern const char *const affinity_source_popular;

extern void materialize(FunctionCallInfo fcinfo);
extern void put_row(FunctionCallInfo fcinfo, Datum *values);
extern void require_arg(FunctionCallInfo fcinfo, int argno, const char *name);
extern int64 get_k(FunctionCallInfo fcinfo, int argno, int64 limit);
extern void require_factors(const AffModelView *v, const char *fn);
extern int32 *array_key_indices(FunctionCallInfo fcinfo, int argno,
								const AffModelView *v, bool users, int *n);
extern void emit_topk(FunctionCallInfo fcinfo, AffTopK *t, const AffModelView *v,
					  bool users, const char *source);
extern int64 key_arg_index(FunctionCallInfo fcinfo, int argno, const AffModelView *v,
						   bool users);
extern Datum key_datum(const AffModelView *v, bool users, int64 i);
extern char *key_cstring(const AffModelView *v, bool users, int64 i);
extern void check_finite_scores(const AffModelView *v, bool users, int64 bad,
								const char *request);
extern void check_output_keys(FunctionCallInfo fcinfo, const AffModelView *v, int attno,
							  bool users);
extern bool require_array_keys(FunctionCallInfo fcinfo, int argno, const AffModelView *v,
							   bool users);
extern int64 key_elem_index(const AffModelView *v, bool users, Datum d, bool text_call);
extern ArrayType *vector_array(const float *x, int f);
extern void user_scores(const AffModelView *v, int64 u, float *scores);

#endif
