/*
 * fit_agg.c
 *		The affinity.fit aggregate: collect rows, then fit once.
 *
 * The transition function appends (user, item, weight) to one compact
 * array in the aggregate's memory context (huge allocations, so the state
 * may pass 1 GB), skipping and counting NULL and zero rows and rejecting
 * negative, NaN and infinite weights.  The final function builds the
 * sparse matrix, frees the rows, runs the chosen method and encodes the
 * model.  It keeps the result in the state, because PostgreSQL may call a
 * final function more than once on one state.
 */
#include "affinity_pg.h"

#include <math.h>

#include "libpq/pqformat.h"
#include "miscadmin.h"
#include "portability/instr_time.h"
#include "utils/builtins.h"
#include "utils/ps_status.h"
#include "utils/memutils.h"

#include "../core/interactions.h"
#include "text_keys.h"

typedef struct FitState
{
	MemoryContext cxt;			/* the aggregate context */
	AffTriple  *rows;
	int64		n_rows;
	int64		cap_rows;
	int64		rows_read;
	int64		rows_null;
	int64		rows_zero;
	bool		have_options;
	FitOptions	opts;
	bool		text_keys;		/* fed by the text overload */
	TextDict   *user_texts;		/* text keys seen, when text_keys */
	TextDict   *item_texts;
	bytea	   *result;			/* the model, once finalized */
} FitState;

/* Grow the row array geometrically; guard the byte count first. */
static void
reserve_rows(FitState *st, int64 need);

static void
grow_rows(FitState *st)
{
	reserve_rows(st, st->cap_rows == 0 ? 1024 : st->cap_rows * 2);
}

/* Make room for `need` rows in one step (at least doubling). */
static void
reserve_rows(FitState *st, int64 need)
{
	int64		cap = Max(need, st->cap_rows * 2);
	Size		bytes;

	if (cap > (int64) (MaxAllocHugeSize / sizeof(AffTriple)))
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("too many rows for one affinity.fit"),
				 errdetail("The fit already holds " INT64_FORMAT " rows.", st->n_rows)));
	bytes = (Size) cap * sizeof(AffTriple);
	if (st->rows == NULL)
		st->rows = MemoryContextAllocHuge(st->cxt, bytes);
	else
		st->rows = repalloc_huge(st->rows, bytes);
	st->cap_rows = cap;
}

static FitState *
fit_state_new(FunctionCallInfo fcinfo, MemoryContext aggcxt)
{
	FitState   *st = MemoryContextAllocZero(aggcxt, sizeof(FitState));
	MemoryContext old = MemoryContextSwitchTo(aggcxt);

	st->cxt = aggcxt;
	if (PG_NARGS() > 4 && !PG_ARGISNULL(4))
		fit_options_parse(PG_GETARG_JSONB_P(4), &st->opts);
	else
		fit_options_parse(NULL, &st->opts);
	st->have_options = true;
	MemoryContextSwitchTo(old);
	return st;
}

/* Append one row; shared by the bigint and text transition functions. */
static void
add_row(FitState *st, int64 user, int64 item, float4 w)
{
	if (st->n_rows == st->cap_rows)
		grow_rows(st);
	st->rows[st->n_rows].user = user;
	st->rows[st->n_rows].item = item;
	st->rows[st->n_rows].weight = w;
	st->rows[st->n_rows].pad = 0;
	st->n_rows++;
}

static void
bad_weight(const char *user, const char *item, float4 w)
{
	ereport(ERROR,
			(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
			 errmsg("affinity.fit weights must be finite and not negative"),
			 errdetail("User %s, item %s has weight %g.", user, item, (double) w),
			 errhint("Filter such rows out, or map them to a weight of zero, which is skipped.")));
}

/*
 * The state for this call, counting the row; returns NULL when the row is
 * skipped (a NULL, or a zero weight).  *w gets the weight.
 */
static FitState *
take_row(FunctionCallInfo fcinfo, FitState **stp, float4 *w)
{
	MemoryContext aggcxt;
	FitState   *st;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "affinity.fit transition called in non-aggregate context");
	st = PG_ARGISNULL(0) ? fit_state_new(fcinfo, aggcxt) : (FitState *) PG_GETARG_POINTER(0);
	*stp = st;
	st->rows_read++;
	if (PG_ARGISNULL(1) || PG_ARGISNULL(2) || PG_ARGISNULL(3))
	{
		st->rows_null++;
		return NULL;
	}
	*w = PG_GETARG_FLOAT4(3);
	if (*w == 0)
	{
		st->rows_zero++;
		return NULL;
	}
	return st;
}

PG_FUNCTION_INFO_V1(affinity_fit_transfn);

/* (state, user_id bigint, item_id bigint, weight [, options]) -> state */
Datum
affinity_fit_transfn(PG_FUNCTION_ARGS)
{
	FitState   *st;
	float4		w;

	if (take_row(fcinfo, &st, &w) == NULL)
		PG_RETURN_POINTER(st);
	if (!(w >= 0) || isinf(w))
		bad_weight(psprintf(INT64_FORMAT, PG_GETARG_INT64(1)),
				   psprintf(INT64_FORMAT, PG_GETARG_INT64(2)), w);
	add_row(st, PG_GETARG_INT64(1), PG_GETARG_INT64(2), w);
	PG_RETURN_POINTER(st);
}

PG_FUNCTION_INFO_V1(affinity_fit_text_transfn);

/*
 * (state, user_id text, item_id text, weight [, options]) -> state.  Each
 * text becomes its int64 key; the texts are kept for the model.
 */
Datum
affinity_fit_text_transfn(PG_FUNCTION_ARGS)
{
	FitState   *st;
	float4		w;
	text	   *u;
	text	   *i;
	MemoryContext old;
	int64		uk;
	int64		ik;

	if (take_row(fcinfo, &st, &w) == NULL)
		PG_RETURN_POINTER(st);
	u = PG_GETARG_TEXT_PP(1);
	i = PG_GETARG_TEXT_PP(2);
	if (!(w >= 0) || isinf(w))
		bad_weight(psprintf("\"%s\"", text_to_cstring(u)),
				   psprintf("\"%s\"", text_to_cstring(i)), w);
	if (!st->text_keys)
	{
		st->text_keys = true;
		st->user_texts = text_dict_create(st->cxt);
		st->item_texts = text_dict_create(st->cxt);
	}
	old = MemoryContextSwitchTo(st->cxt);
	uk = text_dict_add(st->user_texts, VARDATA_ANY(u), VARSIZE_ANY_EXHDR(u), "user");
	ik = text_dict_add(st->item_texts, VARDATA_ANY(i), VARSIZE_ANY_EXHDR(i), "item");
	MemoryContextSwitchTo(old);
	add_row(st, uk, ik, w);
	PG_RETURN_POINTER(st);
}

/* Append n rows to st, growing it as needed. */
static void
append_rows(FitState *st, const AffTriple *rows, int64 n)
{
	if (st->cap_rows - st->n_rows < n)
		reserve_rows(st, st->n_rows + n);
	if (n > 0)
		memcpy(st->rows + st->n_rows, rows, sizeof(AffTriple) * n);
	st->n_rows += n;
}

/* Options and counters of b are merged into a (a fresh state takes b's). */
static void
merge_counts(FitState *a, const FitState *b)
{
	if (!a->have_options)
	{
		a->opts = b->opts;
		a->have_options = b->have_options;
	}
	a->rows_read += b->rows_read;
	a->rows_null += b->rows_null;
	a->rows_zero += b->rows_zero;
}

PG_FUNCTION_INFO_V1(affinity_fit_combinefn);

/*
 * Combine two partial states (parallel aggregation).  The order of rows
 * does not matter: the final step sorts them, duplicates included.
 */
Datum
affinity_fit_combinefn(PG_FUNCTION_ARGS)
{
	MemoryContext aggcxt;
	FitState   *a;
	FitState   *b;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "affinity_fit_combinefn called in non-aggregate context");
	if (PG_ARGISNULL(1))
		PG_RETURN_POINTER(PG_ARGISNULL(0) ? NULL : PG_GETARG_POINTER(0));
	b = (FitState *) PG_GETARG_POINTER(1);
	if (PG_ARGISNULL(0))
	{
		a = MemoryContextAllocZero(aggcxt, sizeof(FitState));
		a->cxt = aggcxt;
	}
	else
		a = (FitState *) PG_GETARG_POINTER(0);
	merge_counts(a, b);
	append_rows(a, b->rows, b->n_rows);
	if (b->text_keys)
	{
		if (!a->text_keys)
		{
			a->text_keys = true;
			a->user_texts = text_dict_create(a->cxt);
			a->item_texts = text_dict_create(a->cxt);
		}
		text_dict_merge(a->user_texts, b->user_texts, "user");
		text_dict_merge(a->item_texts, b->item_texts, "item");
	}
	PG_RETURN_POINTER(a);
}

PG_FUNCTION_INFO_V1(affinity_fit_serialfn);

/* Partial state -> bytea: options, counters, then the rows. */
Datum
affinity_fit_serialfn(PG_FUNCTION_ARGS)
{
	FitState   *st = (FitState *) PG_GETARG_POINTER(0);
	StringInfoData buf;
	double		bytes = (double) st->n_rows * sizeof(AffTriple) + 1024 +
		(st->text_keys ? (double) (st->user_texts->bytes + st->item_texts->bytes) * 2 : 0);

	if (bytes > (double) (MaxAllocSize - VARHDRSZ))
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("a parallel worker's share of affinity.fit is too large to pass on"),
				 errdetail("The worker holds " INT64_FORMAT " rows; a serialized state is at most 1 GB.",
						   st->n_rows),
				 errhint("Run the fit without parallel workers: SET max_parallel_workers_per_gather = 0.")));
	pq_begintypsend(&buf);
	enlargeStringInfo(&buf, (int) bytes);	/* one allocation, not doublings */
	pq_sendint8(&buf, st->have_options ? 1 : 0);
	pq_sendbytes(&buf, (const char *) &st->opts, sizeof(FitOptions));
	pq_sendint64(&buf, st->rows_read);
	pq_sendint64(&buf, st->rows_null);
	pq_sendint64(&buf, st->rows_zero);
	pq_sendint64(&buf, st->n_rows);
	/* rows as bytes: the state only travels between processes of one server */
	pq_sendbytes(&buf, (const char *) st->rows, sizeof(AffTriple) * st->n_rows);
	pq_sendint8(&buf, st->text_keys ? 1 : 0);
	if (st->text_keys)
	{
		text_dict_serialize(&buf, st->user_texts);
		text_dict_serialize(&buf, st->item_texts);
	}
	PG_RETURN_BYTEA_P(pq_endtypsend(&buf));
}

PG_FUNCTION_INFO_V1(affinity_fit_deserialfn);

/*
 * bytea -> partial state.  The bytes come from our own serialfn in a
 * worker of the same server, so a plain memory copy of FitOptions is safe.
 */
Datum
affinity_fit_deserialfn(PG_FUNCTION_ARGS)
{
	bytea	   *b = PG_GETARG_BYTEA_PP(0);
	MemoryContext aggcxt;
	FitState   *st;
	StringInfoData buf;
	int64		n;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "affinity_fit_deserialfn called in non-aggregate context");
	st = MemoryContextAllocZero(aggcxt, sizeof(FitState));
	st->cxt = aggcxt;
	buf.data = VARDATA_ANY(b);
	buf.len = VARSIZE_ANY_EXHDR(b);
	buf.maxlen = 0;
	buf.cursor = 0;
	st->have_options = pq_getmsgbyte(&buf) != 0;
	memcpy(&st->opts, pq_getmsgbytes(&buf, sizeof(FitOptions)), sizeof(FitOptions));
	st->rows_read = pq_getmsgint64(&buf);
	st->rows_null = pq_getmsgint64(&buf);
	st->rows_zero = pq_getmsgint64(&buf);
	n = pq_getmsgint64(&buf);
	if (n < 0 || n > (buf.len - buf.cursor) / (int64) sizeof(AffTriple))
		elog(ERROR, "invalid serialized affinity.fit state");
	if (n > 0)
		reserve_rows(st, n);
	if (n > 0)
		memcpy(st->rows, pq_getmsgbytes(&buf, sizeof(AffTriple) * n), sizeof(AffTriple) * n);
	st->n_rows = n;
	st->text_keys = pq_getmsgbyte(&buf) != 0;
	if (st->text_keys)
	{
		st->user_texts = text_dict_deserialize(&buf, aggcxt);
		st->item_texts = text_dict_deserialize(&buf, aggcxt);
	}
	pq_getmsgend(&buf);
	PG_RETURN_POINTER(st);
}

/*
 * Peak memory of the final step, to refuse a fit over
 * affinity.max_fit_memory before anything large is allocated: the rows, the
 * matrix both ways with its dictionaries and confidences, the factors, and
 * the model built twice (the executor copies it once).  Before the matrix
 * exists, users and items are bounded by the row count and only the build
 * is counted (with_factors false: the build allocates O(rows)); afterwards
 * the exact counts and the factors are.
 */
static double
estimate_fit_bytes(const FitState *st, double n_rows, double users, double items,
				   bool with_factors)
{
	double		f = (with_factors && st->opts.method == AFF_METHOD_IMPLICIT_ALS) ?
		st->opts.factors : 0;
	double		entities = users + items;

	return n_rows * sizeof(AffTriple) * 2.0	/* rows and radix-sort scratch */
		+ n_rows * 32.0 + entities * 24.0	/* CSR both ways, dictionaries */
		+ n_rows * 8.0				/* confidences */
		+ 3.0 * entities * f * 4.0	/* factors in the fit and two model copies */
		+ 2.0 * (n_rows * 8.0 + entities * 16.0);	/* training lists in two copies */
}

static void
check_memory(const FitState *st, double n_rows, double users, double items,
			 bool with_factors)
{
	double		need = estimate_fit_bytes(st, n_rows, users, items, with_factors);
	double		limit = (double) affinity_max_fit_memory_mb * 1024.0 * 1024.0;

	if (need > limit)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("affinity.fit would need about %.0f MB, over affinity.max_fit_memory",
						need / (1024.0 * 1024.0)),
				 errdetail("The fit holds %.0f interactions of at most %.0f users and %.0f items; affinity.max_fit_memory is %d MB.",
						   n_rows, users, items, affinity_max_fit_memory_mb),
				 errhint("Raise affinity.max_fit_memory, lower factors, or fit on fewer rows.")));
}

/*
 * Header fields and common sections (the engine's aff_fit_header), then
 * what only the aggregate knows: the rows it read and skipped.
 */
static void
fill_header(AffModelParts *parts, const FitState *st, const AffMatrix *m)
{
	AffModelHeader *h = &parts->h;

	aff_fit_header(parts, &st->opts, m, st->text_keys ? AFF_KEYS_TEXT : AFF_KEYS_BIGINT);
	h->rows_read = st->rows_read;
	h->rows_skipped_null = st->rows_null;
	h->rows_skipped_zero = st->rows_zero;
}

/* The text dictionaries of a text-key fit, in the matrix's key order. */
static void
add_text_sections(FitState *st, const AffMatrix *m, AffModelParts *parts)
{
	int64	   *off;
	char	   *bytes;
	uint64		len;

	text_dict_layout(st->user_texts, m->user_keys, m->n_users, &off, &bytes, &len);
	parts->data[AFF_SEC_USER_TEXT_OFF] = off;
	parts->count[AFF_SEC_USER_TEXT_OFF] = m->n_users + 1;
	parts->data[AFF_SEC_USER_TEXT] = bytes;
	parts->count[AFF_SEC_USER_TEXT] = len;
	text_dict_layout(st->item_texts, m->item_keys, m->n_items, &off, &bytes, &len);
	parts->data[AFF_SEC_ITEM_TEXT_OFF] = off;
	parts->count[AFF_SEC_ITEM_TEXT_OFF] = m->n_items + 1;
	parts->data[AFF_SEC_ITEM_TEXT] = bytes;
	parts->count[AFF_SEC_ITEM_TEXT] = len;
}

/* Item popularity: number of distinct training users. */
static float *
item_popularity(const AffMatrix *m)
{
	float	   *pop = palloc_extended(sizeof(float) * m->n_items, MCXT_ALLOC_HUGE);
	int64		i;

	for (i = 0; i < m->n_items; i++)
		pop[i] = (float) (m->col_ptr[i + 1] - m->col_ptr[i]);
	return pop;
}

/*
 * Show the fit's phase in the process title (ps, top), so an operator can
 * follow a long fit from outside; the title is put back when the fit ends.
 */
static void
show_phase(const char *phase)
{
	set_ps_display(phase);
}

/* The whole final step; returns the model allocated in st->cxt. */
static bytea *
fit_model(FitState *st)
{
	MemoryContext work = AllocSetContextCreate(CurrentMemoryContext,
											   "affinity fit",
											   ALLOCSET_DEFAULT_SIZES);
	MemoryContext old = MemoryContextSwitchTo(work);
	AffAllocator a = context_allocator(work);
	AffMatrix	m;
	AffModelParts parts;
	AffError	err;
	instr_time	t0;
	bytea	   *model;
	double		peak;
	char	   *saved_title;

	INSTR_TIME_SET_CURRENT(t0);
	{
		int			len;
		const char *cur = get_ps_display(&len);

		saved_title = pnstrdup(cur, len);
	}
	show_phase("affinity.fit building the interaction matrix");
	/* users and items are at most the rows until the matrix says */
	check_memory(st, st->n_rows, Min(st->n_rows, AFF_MAX_ENTITIES),
				 Min(st->n_rows, AFF_MAX_ENTITIES), false);
	if (aff_matrix_build(st->rows, st->n_rows, st->opts.min_user_interactions,
						 st->opts.min_item_interactions, &a, &m, &err) != AFF_OK)
		report_engine_error(&err);
	check_memory(st, m.nnz, m.n_users, m.n_items, true);
	/* the rows are not needed any more */
	peak = (double) st->cap_rows * sizeof(AffTriple) + MemoryContextMemAllocated(work, true);
	pfree(st->rows);
	st->rows = NULL;
	st->n_rows = st->cap_rows = 0;

	fill_header(&parts, st, &m);
	if (st->text_keys)
		add_text_sections(st, &m, &parts);
	parts.data[AFF_SEC_POPULARITY] = item_popularity(&m);
	parts.count[AFF_SEC_POPULARITY] = m.n_items;
	method_fit(&m, &st->opts, &parts);

	show_phase("affinity.fit writing the model");
	parts.h.fit_seconds = seconds_since(t0);
	{
		uint64		model_bytes = 0;

		/* at the end: the work context, plus the model and the executor's copy */
		(void) aff_model_size(&parts, &model_bytes, &err);
		peak = Max(peak, (double) MemoryContextMemAllocated(work, true) + 2.0 * model_bytes);
		parts.h.peak_memory = (int64) peak;
	}
	MemoryContextSwitchTo(st->cxt);
	model = model_build(&parts);
	set_ps_display(saved_title);	/* saved_title lives in work */
	MemoryContextSwitchTo(old);
	MemoryContextDelete(work);
	return model;
}

PG_FUNCTION_INFO_V1(affinity_fit_finalfn);

Datum
affinity_fit_finalfn(PG_FUNCTION_ARGS)
{
	FitState   *st;

	if (!AggCheckCallContext(fcinfo, NULL))
		elog(ERROR, "affinity_fit_finalfn called in non-aggregate context");
	if (PG_ARGISNULL(0))
		ereport(ERROR,
				(errcode(ERRCODE_DATA_EXCEPTION),
				 errmsg("affinity.fit received no rows"),
				 errhint("Check the query that feeds the fit; a model needs at least one interaction.")));
	st = (FitState *) PG_GETARG_POINTER(0);
	if (st->result == NULL)
	{
		if (st->n_rows == 0)
			ereport(ERROR,
					(errcode(ERRCODE_DATA_EXCEPTION),
					 errmsg("affinity.fit received no usable rows"),
					 errdetail("Of " INT64_FORMAT " rows, " INT64_FORMAT " had a NULL and " INT64_FORMAT " a zero weight.",
							   st->rows_read, st->rows_null, st->rows_zero),
					 errhint("A model needs at least one row with a positive weight.")));
		st->result = fit_model(st);
	}
	PG_RETURN_POINTER(st->result);
}
