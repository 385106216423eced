/*
 * profiles.c
 *		The affinity.item_profiles aggregates: a catalogue's item x feature
 *		matrix as an affinity.model value of method item_profiles
 *		(core/method_profiles.c), from feature rows (item, feature, value)
 *		or from dense vectors (item, vector); and the refusal of the
 *		serving functions that such a value cannot serve.
 *
 * Item keys are bigint or text, read from the call's argument types; a
 * text item key and every feature text become SipHash keys under one
 * random key that the state draws (written to the header's text_hash_key),
 * as the fit's text keys do (fit_agg.c), and two texts that share a key
 * make the state draw another and re-key.  The memory that the state holds
 * and the build will need is checked against affinity.max_fit_memory as
 * the state grows.
 *
 * The aggregates have no combine function, so PostgreSQL never splits them
 * across parallel workers (a parallel scan below them still feeds the one
 * state): merging two states would have to re-key both dictionaries of
 * one of them, and a catalogue's profiles are small next to its sales.
 */
#include "affinity_pg.h"

#include <math.h>

#include "catalog/pg_type.h"
#include "common/pg_prng.h"
#include "miscadmin.h"
#include "utils/array.h"
#include "utils/builtins.h"
#include "utils/lsyscache.h"
#include "utils/memutils.h"

#include "../core/profiles.h"
#include "text_keys.h"

#define MAX_REKEY_TRIES 8

typedef struct ProfState
{
	MemoryContext cxt;			/* holds the state and all it owns */
	bool		dense;
	bool		text_items;		/* item keys are text */
	bool		opts_done;
	FitOptions	opts;
	uint64		hash_key[2];	/* of the item texts and the feature texts */
	TextDict   *items;			/* text item keys, or NULL */
	TextDict   *features;		/* sparse: the feature texts */
	AffTriple  *rows;			/* sparse: (item, feature, value) */
	int64		n_rows;
	int64		cap_rows;
	int64	   *keys;			/* dense: item of each vector */
	float	   *vecs;			/* dense: n_rows x dim */
	int			dim;
	int64		rows_read;
	int64		rows_zero;
	bytea	   *result;			/* the value, once built */
} ProfState;

static void
draw_key(uint64 key[2])
{
	do
	{
		if (!pg_strong_random(key, sizeof(uint64) * 2))
			ereport(ERROR,
					(errcode(ERRCODE_INTERNAL_ERROR),
					 errmsg("could not generate a random hash key for affinity.item_profiles")));
	} while (key[0] == 0 && key[1] == 0);
}

/* Bytes the state holds and the build will need besides (sort, CSR, value). */
static double
state_need(const ProfState *st)
{
	double		texts = 0;

	if (st->items)
		texts += (double) text_dict_memory(st->items) + 2.0 * st->items->bytes;
	if (st->features)
		texts += (double) text_dict_memory(st->features) + 2.0 * st->features->bytes;
	if (st->dense)
		return (double) st->cap_rows * (8.0 + 4.0 * st->dim) * 3.0 + st->cap_rows * 16.0 + texts;
	return (double) st->cap_rows * sizeof(AffTriple) + (double) st->n_rows * 40.0 + texts;
}

/* Refuse to go on past affinity.max_fit_memory. */
static void
check_memory(const ProfState *st)
{
	double		limit = (double) affinity_max_fit_memory_mb * 1024.0 * 1024.0;
	double		need = state_need(st);

	if (limit <= 0 || need <= limit)
		return;
	ereport(ERROR,
			(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
			 errmsg("affinity.item_profiles would need about %.0f MB, over affinity.max_fit_memory",
					need / (1024.0 * 1024.0)),
			 errdetail("Collecting " INT64_FORMAT " %s of %s; affinity.max_fit_memory is %d MB.",
					   st->n_rows, st->dense ? "vectors" : "feature rows",
					   st->features ? psprintf(INT64_FORMAT " distinct features",
											   text_dict_count(st->features)) : "items",
					   affinity_max_fit_memory_mb),
			 errhint("Raise affinity.max_fit_memory, or leave rare features out in the query.")));
}

/* Options that are not item_profiles' are refused, naming them. */
static void
check_option_names(Jsonb *options)
{
	JsonbIterator *it;
	JsonbValue	v;
	JsonbIteratorToken tok;

	if (!JB_ROOT_IS_OBJECT(options))
		return;					/* fit_options_parse words the error */
	it = JsonbIteratorInit(&options->root);
	while ((tok = JsonbIteratorNext(&it, &v, true)) != WJB_DONE)
	{
		bool		deprecated;
		const AffOptionDef *d;

		if (tok != WJB_KEY)
			continue;
		d = aff_option_by_name(v.val.string.val, v.val.string.len, &deprecated);
		if (d != NULL && !(aff_method_item_profiles.options & AFF_OPT_BIT(d->id)))
			ereport(ERROR,
					(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
					 errmsg("option \"%s\" does not apply to affinity.item_profiles", d->name),
					 errhint("affinity.item_profiles takes \"normalization\" and \"min_document_frequency\".")));
	}
}

/* The options, from the first row that brings them (or the defaults). */
static void
take_options(FunctionCallInfo fcinfo, ProfState *st, int argno)
{
	Jsonb	   *j = NULL;

	if (st->opts_done)
		return;
	if (PG_NARGS() > argno && !PG_ARGISNULL(argno))
	{
		j = PG_GETARG_JSONB_P(argno);
		check_option_names(j);
	}
	fit_options_parse(j, &st->opts);
	if (st->dense && st->opts.normalization == AFF_NORM_TFIDF)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("normalization \"tfidf\" applies to feature rows, not to vectors"),
				 errdetail("The rows are (item, vector) pairs."),
				 errhint("Use \"l2\" or \"none\" for vectors.")));
	if (st->dense && st->opts.min_document_frequency != 1)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("min_document_frequency applies to feature rows, not to vectors"),
				 errdetail("min_document_frequency is %d.", st->opts.min_document_frequency)));
	st->opts_done = true;
}

static ProfState *
get_state(FunctionCallInfo fcinfo, bool dense)
{
	MemoryContext aggcxt;
	ProfState  *st;
	MemoryContext cxt;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "affinity.item_profiles transition called in non-aggregate context");
	if (!PG_ARGISNULL(0))
		return (ProfState *) PG_GETARG_POINTER(0);
	cxt = AllocSetContextCreate(aggcxt, "affinity item_profiles", ALLOCSET_DEFAULT_SIZES);
	st = MemoryContextAllocZero(cxt, sizeof(ProfState));
	st->cxt = cxt;
	st->dense = dense;
	st->text_items = get_fn_expr_argtype(fcinfo->flinfo, 1) == TEXTOID;
	draw_key(st->hash_key);
	if (st->text_items)
		st->items = text_dict_create(cxt);
	if (!dense)
		st->features = text_dict_create(cxt);
	return st;
}

/* The item of argument 1 as text, for messages. */
static char *
item_shown(FunctionCallInfo fcinfo, const ProfState *st)
{
	if (PG_ARGISNULL(1))
		return "NULL";
	if (st->text_items)
		return psprintf("\"%s\"", text_to_cstring(PG_GETARG_TEXT_PP(1)));
	return psprintf(INT64_FORMAT, PG_GETARG_INT64(1));
}

/* A NULL argument cannot be meant: refuse it, naming the row. */
static void
refuse_null(FunctionCallInfo fcinfo, const ProfState *st, const char *what)
{
	ereport(ERROR,
			(errcode(ERRCODE_NULL_VALUE_NOT_ALLOWED),
			 errmsg("affinity.item_profiles received a NULL %s", what),
			 strcmp(what, "item") == 0 ?
			 errdetail("A row has a NULL item id; every row describes one item.") :
			 errdetail("The row of item %s has a NULL %s.", item_shown(fcinfo, st), what),
			 errhint("Leave such rows out in the query, for example WHERE %s IS NOT NULL.",
					 strcmp(what, "item") == 0 ? "item_id" : what)));
}

/* Re-key both dictionaries under a new key and remap what the state holds. */
static void
rekey(ProfState *st)
{
	uint64		key[2];
	int64		i;
	int			tries;

	for (tries = 0;; tries++)
	{
		if (tries == MAX_REKEY_TRIES)
			elog(ERROR, "texts of affinity.item_profiles collide under %d random hash keys",
				 MAX_REKEY_TRIES);
		draw_key(key);
		if (st->items && !text_dict_rekey(st->items, key))
			continue;
		if (st->features && !text_dict_rekey(st->features, key))
		{
			if (st->items)
				text_dict_rekey_abort(st->items);
			continue;
		}
		break;
	}
	for (i = 0; i < st->n_rows; i++)
	{
		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		if (st->dense)
		{
			if (st->items)
				st->keys[i] = text_dict_mapped(st->items, st->keys[i]);
			continue;
		}
		if (st->items)
			st->rows[i].user = text_dict_mapped(st->items, st->rows[i].user);
		st->rows[i].item = text_dict_mapped(st->features, st->rows[i].item);
	}
	if (st->items)
		text_dict_rekey_finish(st->items);
	if (st->features)
		text_dict_rekey_finish(st->features);
	st->hash_key[0] = key[0];
	st->hash_key[1] = key[1];
}

/*
 * The int64 keys of the row's item and (when feature is not NULL) feature
 * text: the item itself for bigint keys, else the texts' keys.
 */
static void
row_keys(FunctionCallInfo fcinfo, ProfState *st, text *feature, int64 *ik, int64 *fk)
{
	MemoryContext old;
	text	   *it = st->text_items ? PG_GETARG_TEXT_PP(1) : NULL;
	int64		before = (st->items ? text_dict_count(st->items) : 0) +
		(st->features ? text_dict_count(st->features) : 0);

	if (!st->text_items)
		*ik = PG_GETARG_INT64(1);
	old = MemoryContextSwitchTo(st->cxt);
	for (;;)
	{
		bool		collision = false;

		if (it != NULL)
			*ik = text_dict_add(st->items, st->hash_key, VARDATA_ANY(it),
								VARSIZE_ANY_EXHDR(it), &collision);
		if (!collision && feature != NULL)
			*fk = text_dict_add(st->features, st->hash_key, VARDATA_ANY(feature),
								VARSIZE_ANY_EXHDR(feature), &collision);
		if (!collision)
			break;
		rekey(st);
	}
	MemoryContextSwitchTo(old);
	if ((st->items ? text_dict_count(st->items) : 0) +
		(st->features ? text_dict_count(st->features) : 0) != before)
		check_memory(st);
}

/* Room for one more row (and its vector). */
static void
reserve_row(ProfState *st)
{
	int64		cap;

	if (st->n_rows < st->cap_rows)
		return;
	cap = st->cap_rows == 0 ? 1024 : st->cap_rows * 2;
	if (cap > AFF_MAX_ENTITIES * 8LL)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("affinity.item_profiles received too many rows"),
				 errdetail("It holds " INT64_FORMAT " rows.", st->n_rows)));
	{
		int64		old_cap = st->cap_rows;

		st->cap_rows = cap;
		check_memory(st);
		st->cap_rows = old_cap;
	}
	if (st->dense)
	{
		Size		vb = (Size) cap * (Size) st->dim * sizeof(float);

		if (st->keys == NULL)
		{
			st->keys = MemoryContextAllocHuge(st->cxt, sizeof(int64) * cap);
			st->vecs = MemoryContextAllocHuge(st->cxt, vb);
		}
		else
		{
			st->keys = repalloc_huge(st->keys, sizeof(int64) * cap);
			st->vecs = repalloc_huge(st->vecs, vb);
		}
	}
	else if (st->rows == NULL)
		st->rows = MemoryContextAllocHuge(st->cxt, sizeof(AffTriple) * cap);
	else
		st->rows = repalloc_huge(st->rows, sizeof(AffTriple) * cap);
	st->cap_rows = cap;
}

PG_FUNCTION_INFO_V1(affinity_profiles_transfn);

/*
 * (state, item_id bigint|text, feature text, value real [, options]):
 * one value of one feature of an item; repeated (item, feature) rows are
 * summed, zero values skipped.
 */
Datum
affinity_profiles_transfn(PG_FUNCTION_ARGS)
{
	ProfState  *st = get_state(fcinfo, false);
	text	   *feature;
	float4		x;
	int64		ik;
	int64		fk = 0;

	if (st->result != NULL)
		elog(ERROR, "affinity.item_profiles state used after its final step");
	take_options(fcinfo, st, 4);
	st->rows_read++;
	if (PG_ARGISNULL(1))
		refuse_null(fcinfo, st, "item");
	if (PG_ARGISNULL(2))
		refuse_null(fcinfo, st, "feature");
	if (PG_ARGISNULL(3))
		refuse_null(fcinfo, st, "value");
	feature = PG_GETARG_TEXT_PP(2);
	x = PG_GETARG_FLOAT4(3);
	if (isnan(x) || isinf(x))
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("affinity.item_profiles values must be finite"),
				 errdetail("Item %s, feature \"%s\" has value %g.", item_shown(fcinfo, st),
						   text_to_cstring(feature), (double) x),
				 errhint("Filter such rows out, or map them to a finite number.")));
	if (VARSIZE_ANY_EXHDR(feature) == 0)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("affinity.item_profiles features must not be empty"),
				 errdetail("Item %s has a feature ''.", item_shown(fcinfo, st)),
				 errhint("Leave such rows out, for example WHERE feature <> ''.")));
	if (x == 0)
	{
		st->rows_zero++;
		PG_RETURN_POINTER(st);
	}
	row_keys(fcinfo, st, feature, &ik, &fk);
	reserve_row(st);
	st->rows[st->n_rows].user = ik;
	st->rows[st->n_rows].item = fk;
	st->rows[st->n_rows].weight = x;
	st->rows[st->n_rows].pad = 0;
	st->n_rows++;
	PG_RETURN_POINTER(st);
}

PG_FUNCTION_INFO_V1(affinity_profiles_vector_transfn);

/* (state, item_id bigint|text, vector real[] [, options]): one item's vector */
Datum
affinity_profiles_vector_transfn(PG_FUNCTION_ARGS)
{
	ProfState  *st = get_state(fcinfo, true);
	ArrayType  *arr;
	int			n;
	float4	   *x;
	int64		ik;
	int			i;

	if (st->result != NULL)
		elog(ERROR, "affinity.item_profiles state used after its final step");
	take_options(fcinfo, st, 3);
	st->rows_read++;
	if (PG_ARGISNULL(1))
		refuse_null(fcinfo, st, "item");
	if (PG_ARGISNULL(2))
		refuse_null(fcinfo, st, "vector");
	arr = PG_GETARG_ARRAYTYPE_P(2);
	n = ArrayGetNItems(ARR_NDIM(arr), ARR_DIMS(arr));
	if (ARR_NDIM(arr) > 1 || array_contains_nulls(arr) || n < 1 || n > AFF_MAX_PROFILE_DIM)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("affinity.item_profiles vectors must be one-dimensional arrays of 1 to %d numbers without NULLs",
						AFF_MAX_PROFILE_DIM),
				 errdetail("Item %s has a vector of %d dimensions and %d elements%s.",
						   item_shown(fcinfo, st), ARR_NDIM(arr), n,
						   array_contains_nulls(arr) ? ", with NULLs" : "")));
	if (st->dim == 0)
		st->dim = n;
	else if (n != st->dim)
		ereport(ERROR,
				(errcode(ERRCODE_ARRAY_SUBSCRIPT_ERROR),
				 errmsg("affinity.item_profiles vectors must all have the same length"),
				 errdetail("Item %s has a vector of %d numbers; the first vector had %d.",
						   item_shown(fcinfo, st), n, st->dim),
				 errhint("Give every item a vector made by the same model.")));
	x = (float4 *) ARR_DATA_PTR(arr);
	for (i = 0; i < n; i++)
		if (isnan(x[i]) || isinf(x[i]))
			ereport(ERROR,
					(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
					 errmsg("affinity.item_profiles values must be finite"),
					 errdetail("Element %d of the vector of item %s is %g.", i + 1,
							   item_shown(fcinfo, st), (double) x[i])));
	row_keys(fcinfo, st, NULL, &ik, NULL);
	reserve_row(st);
	st->keys[st->n_rows] = ik;
	memcpy(st->vecs + (size_t) st->n_rows * st->dim, x, sizeof(float) * n);
	st->n_rows++;
	PG_RETURN_POINTER(st);
}

/* The text of the item with key k, for messages. */
static char *
item_key_shown(ProfState *st, int64 k)
{
	int64	   *off;
	char	   *bytes;
	uint64		len;

	if (!st->text_items)
		return psprintf(INT64_FORMAT, k);
	text_dict_layout(st->items, &k, 1, &off, &bytes, &len);
	return psprintf("\"%s\"", pnstrdup(bytes, (Size) len));
}

static char *
feature_key_shown(ProfState *st, int64 k)
{
	int64	   *off;
	char	   *bytes;
	uint64		len;

	text_dict_layout(st->features, &k, 1, &off, &bytes, &len);
	return pnstrdup(bytes, (Size) len);
}

/* The texts of the dictionary d for the n sorted keys, as sections kind_off, kind_text. */
static void
add_texts(AffModelParts *parts, TextDict *d, const int64 *keys, int64 n, int kind_off,
		  int kind_text)
{
	int64	   *off;
	char	   *bytes;
	uint64		len;

	text_dict_layout(d, keys, n, &off, &bytes, &len);
	parts->data[kind_off] = off;
	parts->count[kind_off] = (uint64) n + 1;
	parts->data[kind_text] = bytes;
	parts->count[kind_text] = len;
}

static bytea *
build_value(ProfState *st)
{
	static const int64 zero_off[1] = {0};
	MemoryContext work = AllocSetContextCreate(CurrentMemoryContext, "affinity item_profiles build",
											   ALLOCSET_DEFAULT_SIZES);
	MemoryContext old = MemoryContextSwitchTo(work);
	AffAllocator a = context_allocator(work);
	AffProfileParams p;
	AffProfileBuild out;
	AffModelParts parts;
	AffError	err;
	AffStatus	rc;
	instr_time	t0;
	bytea	   *value;

	INSTR_TIME_SET_CURRENT(t0);
	memset(&parts, 0, sizeof(parts));
	memset(&p, 0, sizeof(p));
	p.normalization = st->opts.normalization;
	p.min_df = st->opts.min_document_frequency;
	p.poll = engine_poll;
	if (st->dense)
		rc = aff_profiles_build_dense(st->keys, st->vecs, st->n_rows, st->dim, &p, &a,
									  &parts, &out, &err);
	else
		rc = aff_profiles_build_sparse(st->rows, st->n_rows, &p, &a, &parts, &out, &err);
	if (rc == AFF_ERR_INVALID && st->dense && err.status == AFF_ERR_INVALID &&
		strcmp(err.msg, "an item has two vectors") == 0)
		ereport(ERROR,
				(errcode(ERRCODE_UNIQUE_VIOLATION),
				 errmsg("affinity.item_profiles received two vectors for one item"),
				 errdetail("Item %s has more than one vector.", item_key_shown(st, out.dup_key)),
				 errhint("Give each item one vector, for example with DISTINCT ON (item_id).")));
	if (rc == AFF_ERR_INVALID && !st->dense && (out.bad_key[0] != 0 || out.bad_key[1] != 0))
		ereport(ERROR,
				(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
				 errmsg("%s", err.msg),
				 errdetail("The values of item %s, feature \"%s\" add up beyond the range of real.",
						   item_key_shown(st, out.bad_key[0]),
						   feature_key_shown(st, out.bad_key[1]))));
	engine_check(rc, &err);

	parts.h.key_type = st->text_items ? AFF_KEYS_TEXT : AFF_KEYS_BIGINT;
	parts.h.text_hash_key[0] = st->hash_key[0];
	parts.h.text_hash_key[1] = st->hash_key[1];
	parts.h.rows_read = st->rows_read;
	parts.h.rows_skipped_zero = st->rows_zero;
	parts.h.duplicates_summed = out.duplicates_summed;
	if (st->text_items)
	{
		parts.data[AFF_SEC_USER_TEXT_OFF] = zero_off;
		parts.count[AFF_SEC_USER_TEXT_OFF] = 1;
		parts.data[AFF_SEC_USER_TEXT] = zero_off;
		parts.count[AFF_SEC_USER_TEXT] = 0;
		add_texts(&parts, st->items, out.item_keys, out.n_items, AFF_SEC_ITEM_TEXT_OFF,
				  AFF_SEC_ITEM_TEXT);
	}
	if (!st->dense)
	{
		add_texts(&parts, st->features, out.feature_keys, out.n_features,
				  AFF_SEC_FEATURE_TEXT_OFF, AFF_SEC_FEATURE_TEXT);
		parts.data[AFF_SEC_FEATURE_KEYS] = out.feature_keys;
	}
	parts.h.fit_seconds = seconds_since(t0);
	MemoryContextSwitchTo(st->cxt);
	value = model_build(&parts);
	MemoryContextSwitchTo(old);
	MemoryContextDelete(work);
	return value;
}

PG_FUNCTION_INFO_V1(affinity_profiles_finalfn);

Datum
affinity_profiles_finalfn(PG_FUNCTION_ARGS)
{
	ProfState  *st;

	if (!AggCheckCallContext(fcinfo, NULL))
		elog(ERROR, "affinity_profiles_finalfn called in non-aggregate context");
	if (PG_ARGISNULL(0))
		ereport(ERROR,
				(errcode(ERRCODE_DATA_EXCEPTION),
				 errmsg("affinity.item_profiles received no rows"),
				 errhint("Check the query that feeds it; profiles need at least one item with a feature or a vector.")));
	st = (ProfState *) PG_GETARG_POINTER(0);
	if (st->result == NULL)
	{
		if (st->n_rows == 0)
			ereport(ERROR,
					(errcode(ERRCODE_DATA_EXCEPTION),
					 errmsg("affinity.item_profiles received no usable rows"),
					 errdetail("Of " INT64_FORMAT " rows, " INT64_FORMAT " had a zero value.",
							   st->rows_read, st->rows_zero),
					 errhint("Profiles need at least one non-zero feature value.")));
		st->result = build_value(st);
		/* the rows are not needed any more */
		if (st->rows)
			pfree(st->rows);
		if (st->vecs)
			pfree(st->vecs);
		st->rows = NULL;
		st->vecs = NULL;
		st->n_rows = st->cap_rows = 0;
	}
	PG_RETURN_POINTER(st->result);
}

/*
 * Refuse to serve a catalogue value (item profiles) from function fn: it
 * holds item content, not purchases, so nothing in it ranks items for a
 * user.
 */
void
refuse_catalogue(const AffModelView *v, const char *fn)
{
	const int64_t *info = v->sections[AFF_SEC_PROFILE_INFO];

	if (v->h->method == AFF_METHOD_SEQUENTIAL_RULES)
		refuse_sequences(v, fn);
	ereport(ERROR,
			(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
			 errmsg("%s cannot serve item profiles", fn),
			 errdetail("The value is an item_profiles value of " INT64_FORMAT " items and " INT64_FORMAT " %s: item content, without users or purchases.",
					   v->h->n_items, info ? info[AFF_PINFO_FEATURES] : 0,
					   info && info[AFF_PINFO_KIND] == AFF_PROFILE_DENSE ? "dimensions" : "features"),
			 errhint("Use affinity.items_like for content look-alikes, and affinity.fit on purchases to rank items for users.")));
}

/*
 * Called by model_get for every value: a catalogue value goes only to the
 * functions that read item content (items_like, describe), and a value of
 * sequential rules also to next_items and next_items_for_all.
 */
void
check_catalogue_call(FunctionCallInfo fcinfo, const AffModelView *v)
{
	char	   *fn;

	if (!model_method(v)->catalogue)
		return;
	fn = fcinfo->flinfo ? get_func_name(fcinfo->flinfo->fn_oid) : NULL;
	if (fn != NULL && (strcmp(fn, "items_like") == 0 || strcmp(fn, "describe") == 0))
		return;
	if (fn != NULL && v->h->method == AFF_METHOD_SEQUENTIAL_RULES &&
		(strcmp(fn, "next_items") == 0 || strcmp(fn, "next_items_for_all") == 0))
		return;
	refuse_catalogue(v, fn ? fn : "this function");
}
