/*
 * serving_common.c
 *		Helpers shared by the serving functions: set-returning plumbing,
 *		argument checks, key lists to index lists, emitting a top-k.
 */
#include "serving_common.h"
#include "text_keys.h"

#include "catalog/pg_type.h"
#include "funcapi.h"
#include "utils/array.h"
#include "utils/builtins.h"
#include "utils/tuplestore.h"

Jsonb *
jsonb_from_cstring(const char *s)
{
	return DatumGetJsonbP(DirectFunctionCall1(jsonb_in, CStringGetDatum(s)));
}

/*
 * Set up materialize mode.  When the executor gives the expected row type,
 * use it instead of looking the function's result type up again: that
 * lookup allocates in the per-query context, which a LATERAL call per row
 * would grow until the query ends.
 */
void
materialize(FunctionCallInfo fcinfo)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	bits32		flags = 0;

	if (rsinfo != NULL && IsA(rsinfo, ReturnSetInfo) && rsinfo->expectedDesc != NULL)
		flags = MAT_SRF_USE_EXPECTED_DESC;
#if PG_VERSION_NUM >= 150001
	InitMaterializedSRF(fcinfo, flags);
#else
	SetSingleFuncCall(fcinfo, flags);
#endif
}

void
put_row(FunctionCallInfo fcinfo, Datum *values)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	bool		nulls[8] = {false, false, false, false, false, false, false, false};

	tuplestore_putvalues(rsinfo->setResult, rsinfo->setDesc, values, nulls);
}

/* An argument that may not be NULL. */
void
require_arg(FunctionCallInfo fcinfo, int argno, const char *name)
{
	if (PG_ARGISNULL(argno))
		ereport(ERROR,
				(errcode(ERRCODE_NULL_VALUE_NOT_ALLOWED),
				 errmsg("argument \"%s\" must not be NULL", name)));
}

/* k: not NULL, not negative; capped at limit. */
int64
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

void
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

/* The model's key type must be the one the call uses. */
static void
require_key_type(const AffModelView *v, bool text_call)
{
	bool		text_model = v->h->key_type == AFF_KEYS_TEXT;

	if (text_model == text_call)
		return;
	ereport(ERROR,
			(errcode(ERRCODE_DATATYPE_MISMATCH),
			 errmsg("this model has %s keys, but the call uses %s keys",
					text_model ? "text" : "bigint", text_call ? "text" : "bigint"),
			 errdetail("The model was fitted on %s user and item ids.",
					   text_model ? "text" : "bigint"),
			 errhint("Pass the ids as %s, for example %s.", text_model ? "text" : "bigint",
					 text_model ? "'SKU-001'::text or ARRAY['A', 'B']::text[]"
					 : "42::bigint or ARRAY[1, 2]::bigint[]")));
}

/*
 * Index of the key passed as argument argno (bigint or text, as the SQL
 * signature says), or -1 when the model does not know it.
 */
int64
key_arg_index(FunctionCallInfo fcinfo, int argno, const AffModelView *v, bool users)
{
	Oid			t = get_fn_expr_argtype(fcinfo->flinfo, argno);

	if (t == TEXTOID)
	{
		text	   *k = PG_GETARG_TEXT_PP(argno);

		require_key_type(v, true);
		return text_key_index(v, users, VARDATA_ANY(k), VARSIZE_ANY_EXHDR(k));
	}
	require_key_type(v, false);
	return aff_find_key(users ? v->user_keys : v->item_keys,
						users ? v->h->n_users : v->h->n_items, PG_GETARG_INT64(argno));
}

/* The key of index i as the call returns it: bigint or text. */
Datum
key_datum(const AffModelView *v, bool users, int64 i)
{
	AFF_ASSERT(i >= 0 && i < (users ? v->h->n_users : v->h->n_items));
	if (v->h->key_type == AFF_KEYS_TEXT)
		return text_key_datum(v, users, i);
	return Int64GetDatum(users ? v->user_keys[i] : v->item_keys[i]);
}

/* The key of index i as text, for messages. */
char *
key_cstring(const AffModelView *v, bool users, int64 i)
{
	AFF_ASSERT(i >= 0 && i < (users ? v->h->n_users : v->h->n_items));
	if (v->h->key_type == AFF_KEYS_TEXT)
		return TextDatumGetCString(text_key_datum(v, users, i));
	return psprintf(INT64_FORMAT, users ? v->user_keys[i] : v->item_keys[i]);
}

/*
 * Refuse a ranking whose score of item (or user, when users) index bad is
 * not finite (returned by aff_topk_scores or a failed batch); request
 * says whose scores they are ("user 42", "the basket").  No-op for -1.
 */
void
check_finite_scores(const AffModelView *v, bool users, int64 bad, const char *request)
{
	if (bad < 0)
		return;
	ereport(ERROR,
			(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
			 errmsg("a score is not finite"),
			 errdetail("The score of %s %s for %s overflowed the range of real.",
					   users ? "user" : "item", key_cstring(v, users, bad), request),
			 errhint("The model's vectors or the request's weights are too large for float arithmetic; scale the weights down or refit with a larger regularization.")));
}

/* Column attno of the result must hold keys of the model's type. */
void
check_output_keys(FunctionCallInfo fcinfo, const AffModelView *v, int attno)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	Oid			t = TupleDescAttr(rsinfo->setDesc, attno)->atttypid;

	require_key_type(v, t == TEXTOID);
}

/*
 * Index of one element of a key list (text when text_call, else bigint) of
 * the model's users or items, or -1 when the model does not know it.  The
 * list's type has been checked against the model's keys.
 */
int64
elem_key_index(const AffModelView *v, bool users, bool text_call, Datum d)
{
	if (text_call)
	{
		text	   *k = DatumGetTextPP(d);

		return text_key_index(v, users, VARDATA_ANY(k), VARSIZE_ANY_EXHDR(k));
	}
	return aff_find_key(users ? v->user_keys : v->item_keys,
						users ? v->h->n_users : v->h->n_items, DatumGetInt64(d));
}

/*
 * Indices of the known keys of a bigint[] or text[] argument (NULL elements
 * and unknown keys ignored), sorted and without repeats.  *n gets the count.
 */
int32 *
array_key_indices(FunctionCallInfo fcinfo, int argno, const AffModelView *v, bool users,
				  int *n)
{
	ArrayType  *arr = PG_GETARG_ARRAYTYPE_P(argno);
	bool		text_call = ARR_ELEMTYPE(arr) == TEXTOID;
	Datum	   *elems;
	bool	   *nulls;
	int			ne;
	int32	   *idx;
	int			i;
	int			out = 0;

	require_key_type(v, text_call);
	if (text_call)
		deconstruct_array(arr, TEXTOID, -1, false, TYPALIGN_INT, &elems, &nulls, &ne);
	else
		deconstruct_array(arr, INT8OID, 8, true, TYPALIGN_DOUBLE, &elems, &nulls, &ne);
	idx = palloc(sizeof(int32) * (ne + 1));
	for (i = 0; i < ne; i++)
	{
		int64		j;

		if (nulls[i])
			continue;
		j = elem_key_index(v, users, text_call, elems[i]);
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

/*
 * Emit the heap's content as (key, score, rank) rows, with a fourth
 * column, source, when the result has one (top_items since 1.3; a database
 * not yet updated declares three columns, and gets three).
 */
void
emit_topk(FunctionCallInfo fcinfo, AffTopK *t, const AffModelView *v, bool users,
		  const char *source)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	int64		n = aff_topk_finish(t);
	int64		r;
	bool		with_source = source != NULL && rsinfo->setDesc->natts >= 4;
	Datum		src = with_source ? CStringGetTextDatum(source) : (Datum) 0;

	AFF_ASSERT(n >= 0 && n <= t->k);
	for (r = 0; r < n; r++)
	{
		Datum		values[4];

		values[0] = key_datum(v, users, t->heap[r].index);
		values[1] = Float4GetDatum(t->heap[r].score);
		values[2] = Int32GetDatum((int32) (r + 1));
		values[3] = src;
		put_row(fcinfo, values);
	}
}

ArrayType *
vector_array(const float *x, int f)
{
	Datum	   *d = palloc(sizeof(Datum) * f);
	int			k;

	for (k = 0; k < f; k++)
		d[k] = Float4GetDatum(x[k]);
	return construct_array(d, f, FLOAT4OID, 4, true, TYPALIGN_INT);
}

