/*
 * serving.c
 *		Serving functions: top_items, items_like, score, the vector exports
 *		and describe.
 *
 * Every function reads the model through model_fetch (detoasted once per
 * query for stored values) and works on index space: keys are mapped to
 * dense indices by binary search in the sorted dictionaries, exclusions
 * become a byte mask over items, candidate lists a sorted index list, and
 * the best k come from a bounded heap (core/topk.c), never a full sort.
 * An unknown user or item is not an error.
 */
#include "affinity_pg.h"

#include <cblas.h>
#include <math.h>

#include "catalog/pg_type.h"
#include "funcapi.h"
#include "lib/stringinfo.h"
#include "miscadmin.h"
#include "utils/array.h"
#include "utils/builtins.h"
#include "utils/float.h"
#include "utils/lsyscache.h"
#include "utils/tuplestore.h"

#include "../core/interactions.h"
#include "../core/topk.h"
#include "weights.h"

Jsonb *
jsonb_from_cstring(const char *s)
{
	return DatumGetJsonbP(DirectFunctionCall1(jsonb_in, CStringGetDatum(s)));
}

static void
materialize(FunctionCallInfo fcinfo)
{
#if PG_VERSION_NUM >= 150001
	InitMaterializedSRF(fcinfo, 0);
#else
	SetSingleFuncCall(fcinfo, 0);
#endif
}

static void
put_row(FunctionCallInfo fcinfo, Datum *values)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	bool		nulls[4] = {false, false, false, false};

	tuplestore_putvalues(rsinfo->setResult, rsinfo->setDesc, values, nulls);
}

/* An argument that may not be NULL. */
static void
require_arg(FunctionCallInfo fcinfo, int argno, const char *name)
{
	if (PG_ARGISNULL(argno))
		ereport(ERROR,
				(errcode(ERRCODE_NULL_VALUE_NOT_ALLOWED),
				 errmsg("argument \"%s\" must not be NULL", name)));
}

/* k: not NULL, not negative; capped at limit. */
static int64
get_k(FunctionCallInfo fcinfo, int argno, int64 limit)
{
	int32		k;

	require_arg(fcinfo, argno, "k");
	k = PG_GETARG_INT32(argno);
	if (k < 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("k must not be negative"),
				 errdetail("k is %d.", k)));
	return k < limit ? k : limit;
}

static void
require_factors(const AffModelView *v, const char *fn)
{
	if (v->item_factors == NULL)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("%s needs a model with latent factors", fn),
				 errdetail("This model was fitted with method \"%s\".",
						   aff_method_name(v->h->method)),
				 errhint("Fit with method \"implicit_als\".")));
}

static int
cmp_int32(const void *a, const void *b)
{
	int32		x = *(const int32 *) a;
	int32		y = *(const int32 *) b;

	return x < y ? -1 : (x > y);
}

/*
 * Indices of the known keys of a bigint[] argument (NULL elements and
 * unknown keys ignored), sorted and without repeats.  *n gets the count.
 */
static int32 *
array_item_indices(FunctionCallInfo fcinfo, int argno, const AffModelView *v, int *n)
{
	ArrayType  *arr = PG_GETARG_ARRAYTYPE_P(argno);
	Datum	   *elems;
	bool	   *nulls;
	int			ne;
	int32	   *idx;
	int			i;
	int			out = 0;

	deconstruct_array(arr, INT8OID, 8, true, TYPALIGN_DOUBLE, &elems, &nulls, &ne);
	idx = palloc(sizeof(int32) * (ne + 1));
	for (i = 0; i < ne; i++)
	{
		int64		j;

		if (nulls[i])
			continue;
		j = aff_find_key(v->item_keys, v->h->n_items, DatumGetInt64(elems[i]));
		if (j >= 0)
			idx[out++] = (int32) j;
	}
	qsort(idx, out, sizeof(int32), cmp_int32);
	*n = 0;
	for (i = 0; i < out; i++)
		if (i == 0 || idx[i] != idx[i - 1])
			idx[(*n)++] = idx[i];
	return idx;
}

/* Emit the heap's content as (key, score, rank) rows. */
static void
emit_topk(FunctionCallInfo fcinfo, AffTopK *t, const int64 *keys)
{
	int64		n = aff_topk_finish(t);
	int64		r;

	for (r = 0; r < n; r++)
	{
		Datum		values[3];

		values[0] = Int64GetDatum(keys[t->heap[r].index]);
		values[1] = Float4GetDatum(t->heap[r].score);
		values[2] = Int32GetDatum((int32) (r + 1));
		put_row(fcinfo, values);
	}
}

static inline float
dot_f(const float *a, const float *b, int f)
{
	float		s = 0;
	int			k;

	for (k = 0; k < f; k++)
		s += a[k] * b[k];
	return s;
}

/*
 * Fill scores[] for all items (or, with cand, only the candidates) from
 * the user vector x, or from popularity when x is NULL.
 */
static void
score_items(const AffModelView *v, const float *x, const int32 *cand, int n_cand,
			float *scores)
{
	int			f = v->h->factors;
	int			c;

	if (x == NULL)
	{
		if (cand == NULL)
			memcpy(scores, v->popularity, sizeof(float) * v->h->n_items);
		else
			for (c = 0; c < n_cand; c++)
				scores[cand[c]] = v->popularity[cand[c]];
	}
	else if (cand == NULL)
		cblas_sgemv(CblasRowMajor, CblasNoTrans, (int) v->h->n_items, f, 1.0f,
					v->item_factors, f, x, 1, 0.0f, scores, 1);
	else
		for (c = 0; c < n_cand; c++)
			scores[cand[c]] = dot_f(v->item_factors + (size_t) cand[c] * f, x, f);
}

PG_FUNCTION_INFO_V1(top_items);

/*
 * top_items(model, user_id, k, exclude_seen, exclude, candidates,
 *			 fallback_popular) -> (item_id, score, rank)
 */
Datum
top_items(PG_FUNCTION_ARGS)
{
	AffModelView v;
	int64		k;
	int64		u = -1;
	bool		exclude_seen;
	bool		fallback;
	uint8	   *skip;
	int32	   *cand = NULL;
	int			n_cand = 0;
	const float *x = NULL;
	float	   *scores;
	AffTopK		t;
	int64		i;
	int64		j;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	model_fetch(fcinfo, 0, &v);
	k = get_k(fcinfo, 2, v.h->n_items);
	require_arg(fcinfo, 3, "exclude_seen");
	require_arg(fcinfo, 6, "fallback_popular");
	exclude_seen = PG_GETARG_BOOL(3);
	fallback = PG_GETARG_BOOL(6);

	u = aff_find_key(v.user_keys, v.h->n_users, PG_GETARG_INT64(1));
	if (k == 0 || (u < 0 && !fallback))
		return (Datum) 0;
	if (u >= 0 && v.h->method == AFF_METHOD_IMPLICIT_ALS)
		x = v.user_factors + (size_t) u * v.h->factors;

	skip = palloc0(v.h->n_items);
	if (u >= 0 && exclude_seen)
		for (j = v.seen_ptr[u]; j < v.seen_ptr[u + 1]; j++)
			skip[v.seen_items[j]] = 1;
	if (!PG_ARGISNULL(4))
	{
		int			n;
		int32	   *ex = array_item_indices(fcinfo, 4, &v, &n);

		for (i = 0; i < n; i++)
			skip[ex[i]] = 1;
	}
	if (!PG_ARGISNULL(5))
		cand = array_item_indices(fcinfo, 5, &v, &n_cand);

	scores = palloc_extended(sizeof(float) * v.h->n_items, MCXT_ALLOC_HUGE);
	score_items(&v, x, cand, n_cand, scores);
	aff_topk_init(&t, palloc(sizeof(AffScored) * k), k);
	if (cand == NULL)
	{
		for (i = 0; i < v.h->n_items; i++)
			if (!skip[i])
				aff_topk_push(&t, scores[i], (int32) i);
	}
	else
		for (i = 0; i < n_cand; i++)
			if (!skip[cand[i]])
				aff_topk_push(&t, scores[cand[i]], cand[i]);
	emit_topk(fcinfo, &t, v.item_keys);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(items_like);

/* items_like(model, item_id, k, candidates) -> (item_id, similarity, rank) */
Datum
items_like(PG_FUNCTION_ARGS)
{
	AffModelView v;
	int64		k;
	int64		it;
	int			f;
	const float *y;
	float		ny;
	int32	   *cand = NULL;
	int			n_cand = 0;
	AffTopK		t;
	int64		i;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	model_fetch(fcinfo, 0, &v);
	require_factors(&v, "items_like");
	k = get_k(fcinfo, 2, v.h->n_items);
	it = aff_find_key(v.item_keys, v.h->n_items, PG_GETARG_INT64(1));
	if (it < 0 || k == 0)
		return (Datum) 0;
	if (!PG_ARGISNULL(3))
		cand = array_item_indices(fcinfo, 3, &v, &n_cand);

	f = v.h->factors;
	y = v.item_factors + (size_t) it * f;
	ny = sqrtf(dot_f(y, y, f));
	aff_topk_init(&t, palloc(sizeof(AffScored) * k), k);
	for (i = 0; i < (cand ? n_cand : v.h->n_items); i++)
	{
		int32		j = cand ? cand[i] : (int32) i;
		const float *z = v.item_factors + (size_t) j * f;
		float		nz = sqrtf(dot_f(z, z, f));
		float		sim = (ny > 0 && nz > 0) ? dot_f(y, z, f) / (ny * nz) : 0.0f;

		if (j != it)
			aff_topk_push(&t, sim, j);
	}
	emit_topk(fcinfo, &t, v.item_keys);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(score);

/* score(model, user_id, item_id) -> real, NULL when either is unknown */
Datum
score(PG_FUNCTION_ARGS)
{
	AffModelView v;
	int64		u;
	int64		i;

	model_fetch(fcinfo, 0, &v);
	u = aff_find_key(v.user_keys, v.h->n_users, PG_GETARG_INT64(1));
	i = aff_find_key(v.item_keys, v.h->n_items, PG_GETARG_INT64(2));
	if (u < 0 || i < 0)
		PG_RETURN_NULL();
	if (v.item_factors == NULL)
		PG_RETURN_FLOAT4(v.popularity[i]);
	PG_RETURN_FLOAT4(dot_f(v.user_factors + (size_t) u * v.h->factors,
						   v.item_factors + (size_t) i * v.h->factors,
						   v.h->factors));
}

static ArrayType *
vector_array(const float *x, int f)
{
	Datum	   *d = palloc(sizeof(Datum) * f);
	int			k;

	for (k = 0; k < f; k++)
		d[k] = Float4GetDatum(x[k]);
	return construct_array(d, f, FLOAT4OID, 4, true, TYPALIGN_INT);
}

/* Shared body of user_vector and item_vector. */
static Datum
one_vector(FunctionCallInfo fcinfo, bool users)
{
	AffModelView v;
	int64		j;

	model_fetch(fcinfo, 0, &v);
	require_factors(&v, users ? "user_vector" : "item_vector");
	j = users ? aff_find_key(v.user_keys, v.h->n_users, PG_GETARG_INT64(1))
		: aff_find_key(v.item_keys, v.h->n_items, PG_GETARG_INT64(1));
	if (j < 0)
		PG_RETURN_NULL();
	PG_RETURN_ARRAYTYPE_P(vector_array((users ? v.user_factors : v.item_factors) +
									   (size_t) j * v.h->factors, v.h->factors));
}

/* Shared body of user_vectors and item_vectors. */
static Datum
all_vectors(FunctionCallInfo fcinfo, bool users)
{
	AffModelView v;
	int64		n;
	const int64 *keys;
	const float *F;
	int64		j;

	materialize(fcinfo);
	model_fetch(fcinfo, 0, &v);
	require_factors(&v, users ? "user_vectors" : "item_vectors");
	n = users ? v.h->n_users : v.h->n_items;
	keys = users ? v.user_keys : v.item_keys;
	F = users ? v.user_factors : v.item_factors;
	for (j = 0; j < n; j++)
	{
		Datum		values[2];

		CHECK_FOR_INTERRUPTS();
		values[0] = Int64GetDatum(keys[j]);
		values[1] = PointerGetDatum(vector_array(F + (size_t) j * v.h->factors, v.h->factors));
		put_row(fcinfo, values);
	}
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(user_vector);
Datum
user_vector(PG_FUNCTION_ARGS)
{
	return one_vector(fcinfo, true);
}

PG_FUNCTION_INFO_V1(item_vector);
Datum
item_vector(PG_FUNCTION_ARGS)
{
	return one_vector(fcinfo, false);
}

PG_FUNCTION_INFO_V1(user_vectors);
Datum
user_vectors(PG_FUNCTION_ARGS)
{
	return all_vectors(fcinfo, true);
}

PG_FUNCTION_INFO_V1(item_vectors);
Datum
item_vectors(PG_FUNCTION_ARGS)
{
	return all_vectors(fcinfo, false);
}

static void
append_doubles(StringInfo s, const char *key, const double *x, int64 n)
{
	int64		i;

	appendStringInfo(s, ", \"%s\": [", key);
	for (i = 0; i < n; i++)
		appendStringInfo(s, "%s%s", i ? ", " : "", float8out_internal(x[i]));
	appendStringInfoString(s, "]");
}

/* The options that the model's method used. */
static void
append_options(StringInfo s, const AffModelHeader *h)
{
	appendStringInfo(s, ", \"options\": {\"min_user_interactions\": %d, "
					 "\"min_item_interactions\": %d",
					 h->min_user_interactions, h->min_item_interactions);
	if (h->method == AFF_METHOD_IMPLICIT_ALS)
		appendStringInfo(s, ", \"factors\": %d, \"iterations\": %d, "
						 "\"regularization\": %s, \"alpha\": %s, \"confidence\": \"%s\", "
						 "\"epsilon\": %s, \"solver\": \"%s\", \"cg_steps\": %d, "
						 "\"seed\": " INT64_FORMAT ", \"threads\": %d",
						 h->factors, h->iterations,
						 float8out_internal(h->regularization),
						 float8out_internal(h->alpha),
						 h->confidence == AFF_CONFIDENCE_LINEAR ? "linear" : "log",
						 float8out_internal(h->epsilon),
						 h->solver == AFF_SOLVER_CG ? "cg" : "cholesky",
						 h->cg_steps, h->seed, h->threads);
	appendStringInfoString(s, "}");
}

PG_FUNCTION_INFO_V1(describe);

/* describe(model) -> jsonb */
Datum
describe(PG_FUNCTION_ARGS)
{
	AffModelView v;
	const AffModelHeader *h;
	StringInfoData s;

	model_fetch(fcinfo, 0, &v);
	h = v.h;
	initStringInfo(&s);
	appendStringInfo(&s, "{\"format_version\": %d, \"method\": \"%s\", \"key_type\": \"bigint\", "
					 "\"users\": " INT64_FORMAT ", \"items\": " INT64_FORMAT
					 ", \"interactions\": " INT64_FORMAT,
					 h->version, aff_method_name(h->method),
					 h->n_users, h->n_items, h->nnz);
	append_options(&s, h);
	appendStringInfo(&s, ", \"rows_read\": " INT64_FORMAT ", \"rows_skipped_null\": " INT64_FORMAT
					 ", \"rows_skipped_zero\": " INT64_FORMAT ", \"duplicates_summed\": " INT64_FORMAT
					 ", \"dropped_users\": " INT64_FORMAT ", \"dropped_items\": " INT64_FORMAT
					 ", \"dropped_interactions\": " INT64_FORMAT,
					 h->rows_read, h->rows_skipped_null, h->rows_skipped_zero,
					 h->duplicates_summed, h->dropped_users, h->dropped_items,
					 h->dropped_interactions);
	append_doubles(&s, "loss", v.loss, v.n_sweeps);
	append_doubles(&s, "sweep_seconds", v.sweep_seconds, v.n_sweeps);
	appendStringInfo(&s, ", \"fit_seconds\": %s, \"size_bytes\": " UINT64_FORMAT
					 ", \"checksum\": \"%016llx\", \"fingerprint\": \"%016llx\"}",
					 float8out_internal(h->fit_seconds), h->total_size,
					 (unsigned long long) h->checksum,
					 (unsigned long long) h->fingerprint);
	PG_RETURN_JSONB_P(jsonb_from_cstring(s.data));
}
