/*
 * serving_common.c
 *		Helpers shared by the serving functions: set-returning plumbing,
 *		argument checks, key lists to index lists, emitting a top-k.
 *
 * Keys are checked per side (users, items), never per model.  A key given
 * or returned as bigint needs a side of bigint keys.  A key given or
 * returned as text needs a model with at least one text side: on a mixed
 * model (bigint users with text items, or the reverse) the text forms of
 * the serving functions take a key of the bigint side as text, written as
 * a canonical decimal integer (anything else is a key the model does not
 * know), and return it as text.  A pure bigint model refuses text calls
 * and a pure text model bigint calls, as they always did.
 */
#include "serving_common.h"
#include "text_keys.h"

#include "catalog/pg_type.h"
#include "funcapi.h"
#include "utils/array.h"
#include "utils/builtins.h"
#include "utils/lsyscache.h"
#include "utils/tuplestore.h"

/*
 * Whether the current serving call returns its keys as text: set by
 * check_output_keys from the result column, cleared by materialize().
 * Every function that emits keys runs materialize() and then
 * check_output_keys() before its first row, and a call runs to its end
 * before the next one starts (materialize mode), so the flag always
 * belongs to the call that reads it (key_datum).
 */
static bool keys_out_text = false;

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

	keys_out_text = false;
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

/* Whether t is a key type of the serving functions' arguments. */
static bool
is_key_type(Oid t)
{
	return t == INT8OID || t == TEXTOID || t == INT8ARRAYOID || t == TEXTARRAYOID;
}

/*
 * Argument i of the current call as it appears in the call's text form:
 * keys as text (17850::text, '{1,2}'::text[], NULL::text[]), other values
 * as literals.
 */
static void
append_text_form_arg(StringInfo s, FunctionCallInfo fcinfo, int i, Oid t)
{
	Oid			out;
	bool		varlena;
	char	   *v;

	if (PG_ARGISNULL(i))
	{
		appendStringInfoString(s, is_key_type(t) ?
							   (t == INT8OID || t == TEXTOID ? "NULL::text" : "NULL::text[]")
							   : "NULL");
		return;
	}
	if (t == INT8OID)
	{
		appendStringInfo(s, INT64_FORMAT "::text", PG_GETARG_INT64(i));
		return;
	}
	if (t == BOOLOID)
	{
		appendStringInfoString(s, PG_GETARG_BOOL(i) ? "true" : "false");
		return;
	}
	getTypeOutputInfo(t, &out, &varlena);
	v = OidOutputFunctionCall(out, PG_GETARG_DATUM(i));
	if (t == TEXTOID)
		appendStringInfoString(s, quote_literal_cstr(v));
	else if (t == INT8ARRAYOID || t == TEXTARRAYOID)
		appendStringInfo(s, "%s::text[]", quote_literal_cstr(v));
	else if (t == INT4OID)
		appendStringInfoString(s, v);
	else
		appendStringInfo(s, "%s::%s", quote_literal_cstr(v), format_type_be(t));
}

/*
 * The current call written in its text form, for a hint: the function's
 * name, then its arguments up to the last key argument that is not NULL
 * (or the first key argument, when every one is NULL), keys cast to text:
 * top_items(m, 17850, 5) becomes "affinity.top_items(model, 17850::text)".
 */
static char *
text_form_call(FunctionCallInfo fcinfo)
{
	StringInfoData s;
	int			last = 0;
	int			first_key = 0;
	int			i;
	char	   *name = get_func_name(fcinfo->flinfo->fn_oid);

	for (i = 1; i < fcinfo->nargs; i++)
	{
		Oid			t = get_fn_expr_argtype(fcinfo->flinfo, i);

		if (!is_key_type(t))
			continue;
		if (first_key == 0)
			first_key = i;
		if (!PG_ARGISNULL(i))
			last = i;
	}
	if (last == 0)
		last = first_key;
	initStringInfo(&s);
	appendStringInfo(&s, "affinity.%s(model", name ? name : "?");
	for (i = 1; i <= last; i++)
	{
		appendStringInfoString(&s, ", ");
		append_text_form_arg(&s, fcinfo, i, get_fn_expr_argtype(fcinfo->flinfo, i));
	}
	appendStringInfoChar(&s, ')');
	return s.data;
}

/* A model with one key type on both sides refuses a call of the other. */
static void
refuse_other_type(bool text_model, bool text_call)
{
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
 * A key of side users that the call passes (returning false) or returns
 * (returning true) as bigint or as text (text_call) must suit the model:
 * bigint only on a bigint side, text on any model with a text side.
 */
static void
require_side_type(FunctionCallInfo fcinfo, const AffModelView *v, bool users,
				  bool text_call, bool returning)
{
	int			kt = v->h->key_type;
	bool		side_text = aff_keys_side_text(kt, users);

	if (text_call ? kt != AFF_KEYS_BIGINT : !side_text)
		return;
	if (kt == AFF_KEYS_BIGINT || kt == AFF_KEYS_TEXT)
		refuse_other_type(kt == AFF_KEYS_TEXT, text_call);
	ereport(ERROR,
			(errcode(ERRCODE_DATATYPE_MISMATCH),
			 errmsg("this model has %s user ids and %s item ids, but the call %s bigint %s ids",
					aff_keys_side_text(kt, true) ? "text" : "bigint",
					aff_keys_side_text(kt, false) ? "text" : "bigint",
					returning ? "returns" : "passes", users ? "user" : "item"),
			 errdetail("The model's key types are %s (user, item).", aff_keys_name(kt)),
			 errhint("A model with a text side serves every call in its text form, with its bigint ids written as text: %s.",
					 text_form_call(fcinfo))));
}

/*
 * Index of a key of side users given as text, on either kind of side: a
 * text side looks the text up; a bigint side (of a mixed model) takes a
 * canonical decimal integer, anything else being a key it does not know.
 * -1 when the model does not know the key.
 */
static int64
text_arg_index(const AffModelView *v, bool users, text *k)
{
	return text_key_lookup(v, users, VARDATA_ANY(k), VARSIZE_ANY_EXHDR(k));
}

/*
 * Index of the key passed as argument argno (bigint or text, as the SQL
 * signature says), or -1 when the model does not know it.
 */
int64
key_arg_index(FunctionCallInfo fcinfo, int argno, const AffModelView *v, bool users)
{
	Oid			t = get_fn_expr_argtype(fcinfo->flinfo, argno);

	require_side_type(fcinfo, v, users, t == TEXTOID, false);
	if (t == TEXTOID)
		return text_arg_index(v, users, PG_GETARG_TEXT_PP(argno));
	return aff_find_key(users ? v->user_keys : v->item_keys,
						users ? v->h->n_users : v->h->n_items, PG_GETARG_INT64(argno));
}

/*
 * The key of index i as the call returns it: text for a text side, and
 * for a bigint side when the call returns text keys (check_output_keys);
 * bigint otherwise.
 */
Datum
key_datum(const AffModelView *v, bool users, int64 i)
{
	int64		key;

	AFF_ASSERT(i >= 0 && i < (users ? v->h->n_users : v->h->n_items));
	if (aff_keys_side_text(v->h->key_type, users))
		return text_key_datum(v, users, i);
	key = users ? v->user_keys[i] : v->item_keys[i];
	if (keys_out_text)
		return CStringGetTextDatum(psprintf(INT64_FORMAT, key));
	return Int64GetDatum(key);
}

/* The key of index i as text, for messages. */
char *
key_cstring(const AffModelView *v, bool users, int64 i)
{
	AFF_ASSERT(i >= 0 && i < (users ? v->h->n_users : v->h->n_items));
	if (aff_keys_side_text(v->h->key_type, users))
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

/*
 * Column attno of the result holds keys of side users: its type (bigint or
 * text) must suit the model (require_side_type), and a text column makes
 * the call return every key as text (key_datum).
 */
void
check_output_keys(FunctionCallInfo fcinfo, const AffModelView *v, int attno, bool users)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	Oid			t = TupleDescAttr(rsinfo->setDesc, attno)->atttypid;

	require_side_type(fcinfo, v, users, t == TEXTOID, true);
	keys_out_text = t == TEXTOID;
}

/*
 * The elements of the bigint[] or text[] argument argno must suit side
 * users of the model (require_side_type); whether they are text.
 */
bool
require_array_keys(FunctionCallInfo fcinfo, int argno, const AffModelView *v, bool users)
{
	bool		text_call = ARR_ELEMTYPE(PG_GETARG_ARRAYTYPE_P(argno)) == TEXTOID;

	require_side_type(fcinfo, v, users, text_call, false);
	return text_call;
}

/*
 * Index of one element d of a key array (text when text_call) on side
 * users, or -1 when the model does not know it; the array's type was
 * checked with require_array_keys.
 */
int64
key_elem_index(const AffModelView *v, bool users, Datum d, bool text_call)
{
	if (text_call)
		return text_arg_index(v, users, DatumGetTextPP(d));
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
	bool		text_call = require_array_keys(fcinfo, argno, v, users);
	Datum	   *elems;
	bool	   *nulls;
	int			ne;
	int32	   *idx;
	int			i;
	int			out = 0;

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
		j = key_elem_index(v, users, elems[i], text_call);
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
	int64		n = aff_topk_finish(t);

	AFF_ASSERT(n >= 0 && n <= t->k);
	emit_scored(fcinfo, t->heap, n, v, users, source);
}

/* Emit list[0 .. n) in its order as (key, score, rank [, source]) rows. */
void
emit_scored(FunctionCallInfo fcinfo, const AffScored *list, int64 n, const AffModelView *v,
			bool users, const char *source)
{
	ReturnSetInfo *rsinfo = (ReturnSetInfo *) fcinfo->resultinfo;
	bool		with_source = source != NULL && rsinfo->setDesc->natts >= 4;
	Datum		src = with_source ? CStringGetTextDatum(source) : (Datum) 0;
	int64		r;

	for (r = 0; r < n; r++)
	{
		Datum		values[4];

		values[0] = key_datum(v, users, list[r].index);
		values[1] = Float4GetDatum(list[r].score);
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

