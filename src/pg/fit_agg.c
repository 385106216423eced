/*
 * fit_agg.c
 *		The affinity.fit aggregate: collect rows, then fit once.
 *
 * The transition function appends (user, item, weight) to one compact
 * array in the state's own memory context, a child of the aggregate's
 * (huge allocations, so the state may pass 1 GB), skipping and counting
 * NULL and zero rows and rejecting negative, NaN and infinite weights.  The
 * final function builds the sparse matrix, frees the rows, runs the chosen
 * method and encodes the model.  It keeps the result in the state, because
 * PostgreSQL may call a final function more than once on one state.
 *
 * affinity.max_fit_memory is enforced as the rows arrive: whenever the
 * state takes memory (its row array doubles, a text dictionary adds a
 * text) the estimate of what the final step will need (rows, matrix, text
 * keys as their dictionaries really hold them) is checked, so the fit stops
 * by the first doubling of the rows after the one that takes it over the
 * limit.  The peak stored in the model is measured, not estimated: the
 * bytes allocated in the state's context and the fit's work context,
 * sampled at every engine allocation.
 *
 * Text keys are hashed under a random key per state (text_keys.c); states
 * of parallel workers each have their own, so combine re-keys the other
 * state's texts and remaps its rows.  A side of bigint keys (a mixed fit:
 * bigint users with text items, or text users with bigint items) keeps its
 * keys as they are: its dictionary stays empty and no re-key touches it.
 */
#include "affinity_pg.h"

#include <math.h>

#include "catalog/pg_type.h"
#include "libpq/pqformat.h"
#include "miscadmin.h"
#include "port.h"
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
	bool		text_keys;		/* fed by an overload with a text side */
	bool		user_text;		/* when text_keys: the user side is text */
	bool		item_text;		/* when text_keys: the item side is text */
	TextDict   *user_texts;		/* text keys seen, when text_keys (empty */
	/* for a bigint side) */
	TextDict   *item_texts;
	uint64		text_hash_key[2];	/* the texts' hash key, when text_keys */
	Size		text_memory;	/* bytes the two dictionaries hold */
	Size		counted;		/* bytes of cxt in held_total */
	Size		wire_bytes;		/* size of the serialized form it came from */
	bool		serialized;		/* rows handed on by serialfn, and freed */
	bool		rows_borrowed;	/* rows point into the serialized bytes (see deserialfn) */
	bytea	   *result;			/* the model, once finalized */
	bytea	   *profiles;		/* item profiles (method content), or NULL */
} FitState;

/*
 * Bytes held by every live fit state of this backend (a parallel leader has
 * its own partial state and the states it combines), and their peak since
 * the backend last held none: the part of a fit's peak that comes before
 * its final step.  A reset callback on each state's context takes its
 * bytes out when PostgreSQL frees it.
 */
static Size held_total = 0;
static double held_peak = 0;

/*
 * Serialized states this backend has read (a parallel leader): each came
 * through a tuple queue whose receive buffer keeps a copy of the largest
 * message until the Gather node shuts down, after the fit.  Outside our
 * contexts, but memory the fit makes the backend hold.
 */
static double held_wire = 0;

/* First word of a serialized fit state. */
#define FIT_STATE_MAGIC 0x41465331	/* "AFS1" */

/* Re-keying gives up after this many colliding keys (each is ~n^2/2^65). */
#define MAX_REKEY_TRIES 8

static void check_memory(const FitState *st, double n_rows, double users,
						 double items, bool with_factors);
static void free_text_dicts(FitState *st);

/*
 * Bring st's bytes in held_total up to date; extra is memory held beside
 * the states for the moment (a serialized state being read).
 */
static void
account(FitState *st, double extra)
{
	Size		now = MemoryContextMemAllocated(st->cxt, true);

	held_total = held_total - st->counted + now;
	st->counted = now;
	held_peak = Max(held_peak, (double) held_total + held_wire + extra);
}

/* Reset callback of a state's context: its bytes are gone. */
static void
forget_state(void *arg)
{
	FitState   *st = arg;

	held_total -= Min(held_total, st->counted);
	st->counted = 0;
}

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
	account(st, 0);
}

/*
 * An empty state in a new child context of the aggregate context, so that
 * what it holds can be counted (and freed) as a whole.
 */
static FitState *
fit_state_alloc(MemoryContext aggcxt)
{
	MemoryContext cxt = AllocSetContextCreate(aggcxt, "affinity.fit state",
											  ALLOCSET_DEFAULT_SIZES);
	FitState   *st = MemoryContextAllocZero(cxt, sizeof(FitState));
	MemoryContextCallback *cb = MemoryContextAlloc(cxt, sizeof(MemoryContextCallback));

	st->cxt = cxt;
	if (held_total == 0)
	{
		held_peak = 0;			/* a new fit (or fits) in this backend */
		held_wire = 0;
	}
	cb->func = forget_state;
	cb->arg = st;
	MemoryContextRegisterResetCallback(cxt, cb);
	account(st, 0);
	return st;
}

static FitState *
fit_state_new(FunctionCallInfo fcinfo, MemoryContext aggcxt)
{
	FitState   *st = fit_state_alloc(aggcxt);
	MemoryContext old = MemoryContextSwitchTo(st->cxt);

	if (PG_NARGS() > 4 && !PG_ARGISNULL(4))
		fit_options_parse(PG_GETARG_JSONB_P(4), &st->opts);
	else
		fit_options_parse(NULL, &st->opts);
	st->have_options = true;
	MemoryContextSwitchTo(old);
	/* the item profiles of the five-argument form (content.c) */
	if (PG_NARGS() > 5)
		st->profiles = fit_profiles_arg(fcinfo, 5, &st->opts, st->cxt);
	else
		fit_profiles_missing(&st->opts);
	return st;
}

/*
 * Refuse the fit when what the final step will need passes
 * affinity.max_fit_memory; the final step checks the same estimate, so a
 * fit refused here would have been refused there, only later and larger.
 * Called where the state takes memory (before the row array is enlarged,
 * after a text dictionary adds a text, after a combine), not for every
 * row: the estimate only grows with the rows, so a fit over the limit is
 * refused at the latest when its row array next doubles, while the array
 * (24 bytes a row, against the estimate's 200 or more) stays far below the
 * limit.
 */
static inline void
check_growing(const FitState *st)
{
	double		n = (double) st->n_rows;
	double		entities = Min(n, (double) AFF_MAX_ENTITIES);

	check_memory(st, n, entities, entities, false);
}

/* Append one row; shared by the bigint and text transition functions. */
static void
add_row(FitState *st, int64 user, int64 item, float4 w)
{
	if (st->n_rows == st->cap_rows)
	{
		check_growing(st);
		grow_rows(st);
	}
	st->rows[st->n_rows].user = user;
	st->rows[st->n_rows].item = item;
	st->rows[st->n_rows].weight = w;
	st->rows[st->n_rows].pad = 0;
	st->n_rows++;
}

/* A random non-zero 128-bit key from the server's strong random source. */
static void
draw_hash_key(uint64 key[2])
{
	do
	{
		if (!pg_strong_random(key, sizeof(uint64) * 2))
			ereport(ERROR,
					(errcode(ERRCODE_INTERNAL_ERROR),
					 errmsg("could not generate a random hash key for affinity.fit")));
	} while (key[0] == 0 && key[1] == 0);
}

/*
 * The first row of a state fed by an overload with a text side: which
 * sides are text, the dictionaries and their hash key.
 */
static void
start_text_keys(FitState *st, bool user_text, bool item_text)
{
	st->text_keys = true;
	st->user_text = user_text;
	st->item_text = item_text;
	st->user_texts = text_dict_create(st->cxt);
	st->item_texts = text_dict_create(st->cxt);
	draw_hash_key(st->text_hash_key);
}

/*
 * Rows' text keys after a re-key or a merge: each old key becomes the key
 * its dictionary recorded for it (text_dict_mapped).  users or items is
 * NULL for a side of bigint keys, which stay as they are.  O(rows).
 */
static void
remap_rows(AffTriple *rows, int64 n, TextDict *users, TextDict *items)
{
	int64		last_old = 0;
	int64		last_new = 0;
	int64		i;

	for (i = 0; i < n; i++)
	{
		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		/* rows arrive grouped by user more often than not */
		if (users != NULL)
		{
			if (i == 0 || rows[i].user != last_old)
			{
				last_old = rows[i].user;
				last_new = text_dict_mapped(users, last_old);
			}
			rows[i].user = last_new;
		}
		if (items != NULL)
			rows[i].item = text_dict_mapped(items, rows[i].item);
	}
}

/*
 * Two texts share a key under the state's hash key (chance alone does
 * that, about n^2 / 2^65): draw another key, re-key both dictionaries and
 * remap the rows.
 */
static void
rekey_texts_under(FitState *st, const uint64 *given)
{
	uint64		key[2];
	int			tries;

	for (tries = 0;; tries++)
	{
		if (tries == MAX_REKEY_TRIES)
			elog(ERROR, "text keys of affinity.fit collide under %d random hash keys",
				 MAX_REKEY_TRIES);
		if (given != NULL && tries > 0)
			ereport(ERROR,
					(errcode(ERRCODE_DATA_EXCEPTION),
					 errmsg("two text keys of affinity.fit share a hash under the item profiles' key"),
					 errhint("Build the item profiles again: they draw a new hash key.")));
		if (given != NULL)
		{
			key[0] = given[0];
			key[1] = given[1];
		}
		else
			draw_hash_key(key);
		if (!text_dict_rekey(st->user_texts, key))
			continue;
		if (text_dict_rekey(st->item_texts, key))
			break;
		text_dict_rekey_abort(st->user_texts);
	}
	remap_rows(st->rows, st->n_rows, st->user_text ? st->user_texts : NULL,
			   st->item_text ? st->item_texts : NULL);
	text_dict_rekey_finish(st->user_texts);
	text_dict_rekey_finish(st->item_texts);
	st->text_hash_key[0] = key[0];
	st->text_hash_key[1] = key[1];
}

static void
rekey_texts(FitState *st)
{
	rekey_texts_under(st, NULL);
}

/* Bytes the dictionaries hold, after they grew. */
static void
count_text_memory(FitState *st)
{
	st->text_memory = text_dict_memory(st->user_texts) + text_dict_memory(st->item_texts);
	account(st, 0);
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
	if (st->serialized)
		elog(ERROR, "affinity.fit state used after it was serialized");
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
	int64		ik = 0;
	int64		texts;

	if (take_row(fcinfo, &st, &w) == NULL)
		PG_RETURN_POINTER(st);
	u = PG_GETARG_TEXT_PP(1);
	i = PG_GETARG_TEXT_PP(2);
	if (!(w >= 0) || isinf(w))
		bad_weight(psprintf("\"%s\"", text_to_cstring(u)),
				   psprintf("\"%s\"", text_to_cstring(i)), w);
	if (!st->text_keys)
		start_text_keys(st, true, true);
	old = MemoryContextSwitchTo(st->cxt);
	texts = text_dict_count(st->user_texts) + text_dict_count(st->item_texts);
	for (;;)
	{
		bool		collision;

		uk = text_dict_add(st->user_texts, st->text_hash_key, VARDATA_ANY(u),
						   VARSIZE_ANY_EXHDR(u), &collision);
		if (!collision)
			ik = text_dict_add(st->item_texts, st->text_hash_key, VARDATA_ANY(i),
							   VARSIZE_ANY_EXHDR(i), &collision);
		if (!collision)
			break;
		rekey_texts(st);
	}
	MemoryContextSwitchTo(old);
	if (text_dict_count(st->user_texts) + text_dict_count(st->item_texts) != texts)
	{
		count_text_memory(st);
		check_growing(st);
	}
	add_row(st, uk, ik, w);
	PG_RETURN_POINTER(st);
}

/*
 * The int64 key of the text side of a mixed fit's row: its key in dict
 * under the state's hash key (a collision re-keys the state and its rows,
 * then the text is added again).
 */
static int64
text_row_key(FitState *st, TextDict *dict, text *t)
{
	MemoryContext old = MemoryContextSwitchTo(st->cxt);
	int64		texts = text_dict_count(dict);
	int64		key;

	for (;;)
	{
		bool		collision;

		key = text_dict_add(dict, st->text_hash_key, VARDATA_ANY(t), VARSIZE_ANY_EXHDR(t),
							&collision);
		if (!collision)
			break;
		rekey_texts(st);
	}
	MemoryContextSwitchTo(old);
	if (text_dict_count(dict) != texts)
	{
		count_text_memory(st);
		check_growing(st);
	}
	return key;
}

PG_FUNCTION_INFO_V1(affinity_fit_mixed_transfn);

/*
 * (state, user_id bigint, item_id text, weight [, options]) -> state, and
 * (state, user_id text, item_id bigint, ...): the argument types say which
 * side is text.  The bigint side's keys are kept as they are; the text
 * side's become int64 keys as in affinity_fit_text_transfn.
 */
Datum
affinity_fit_mixed_transfn(PG_FUNCTION_ARGS)
{
	FitState   *st;
	float4		w;
	bool		user_text = get_fn_expr_argtype(fcinfo->flinfo, 1) == TEXTOID;
	bool		item_text = get_fn_expr_argtype(fcinfo->flinfo, 2) == TEXTOID;
	int64		uk;
	int64		ik;

	if (user_text == item_text)
		elog(ERROR, "affinity_fit_mixed_transfn needs one bigint and one text key argument");
	if (take_row(fcinfo, &st, &w) == NULL)
		PG_RETURN_POINTER(st);
	if (!(w >= 0) || isinf(w))
		bad_weight(user_text ? psprintf("\"%s\"", text_to_cstring(PG_GETARG_TEXT_PP(1)))
				   : psprintf(INT64_FORMAT, PG_GETARG_INT64(1)),
				   item_text ? psprintf("\"%s\"", text_to_cstring(PG_GETARG_TEXT_PP(2)))
				   : psprintf(INT64_FORMAT, PG_GETARG_INT64(2)), w);
	if (!st->text_keys)
		start_text_keys(st, user_text, item_text);
	if (user_text)
	{
		uk = text_row_key(st, st->user_texts, PG_GETARG_TEXT_PP(1));
		ik = PG_GETARG_INT64(2);
	}
	else
	{
		uk = PG_GETARG_INT64(1);
		ik = text_row_key(st, st->item_texts, PG_GETARG_TEXT_PP(2));
	}
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

/*
 * Give a state that borrows its rows from its serialized form (see
 * affinity_fit_deserialfn) rows of its own: a state that outlives the
 * combine call must not point into the tuple it was read from.
 */
static void
own_rows(FitState *st)
{
	const AffTriple *src = st->rows;
	int64		n = st->n_rows;

	if (!st->rows_borrowed)
		return;
	st->rows = NULL;
	st->n_rows = st->cap_rows = 0;
	st->rows_borrowed = false;
	if (n > 0)
		append_rows(st, src, n);
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

/* Free a state and everything it holds. */
static void
fit_state_free(FitState *st)
{
	MemoryContextDelete(st->cxt);
}

/*
 * Move b's texts into a, under a's hash key, and rewrite b's rows with
 * the keys they have in a.  A collision under a's key re-keys a (and its
 * rows) and merges again.
 */
static void
merge_texts(FitState *a, FitState *b)
{
	MemoryContext old;
	int			tries;

	if (!a->text_keys || a->user_text != b->user_text || a->item_text != b->item_text)
		elog(ERROR, "affinity.fit states of different key types combined");
	old = MemoryContextSwitchTo(a->cxt);
	for (tries = 0;; tries++)
	{
		if (tries == MAX_REKEY_TRIES)
			elog(ERROR, "text keys of affinity.fit collide under %d random hash keys",
				 MAX_REKEY_TRIES);
		if (text_dict_merge(a->user_texts, a->text_hash_key, b->user_texts) &&
			text_dict_merge(a->item_texts, a->text_hash_key, b->item_texts))
			break;
		rekey_texts(a);
	}
	MemoryContextSwitchTo(old);
	remap_rows(b->rows, b->n_rows, a->user_text ? b->user_texts : NULL,
			   a->item_text ? b->item_texts : NULL);
	count_text_memory(a);
}

PG_FUNCTION_INFO_V1(affinity_fit_combinefn);

/*
 * Combine two partial states (parallel aggregation).  The order of rows
 * does not matter: the final step sorts them, duplicates included.
 *
 * state2 always comes from affinity_fit_deserialfn, which builds it in its
 * own context under the aggregate context; its bigint rows still lie in the
 * serialized bytes, valid for this call only.  When state1 holds no rows,
 * state2 becomes the result, its rows copied out of those bytes.  Otherwise
 * state2's texts are re-keyed into state1's, its rows appended (the one copy
 * of a worker's rows the leader makes), and state2 freed at once, so the
 * leader holds each row once.
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
	a = PG_ARGISNULL(0) ? NULL : (FitState *) PG_GETARG_POINTER(0);
	if (a == NULL || (a->n_rows == 0 && !a->text_keys))
	{
		if (a != NULL)
		{
			merge_counts(b, a);
			fit_state_free(a);
		}
		own_rows(b);
		account(b, (double) b->wire_bytes);
		check_growing(b);
		PG_RETURN_POINTER(b);
	}
	if (a->text_keys != b->text_keys && b->n_rows > 0)
		elog(ERROR, "affinity.fit states of different key types combined");
	merge_counts(a, b);
	if (b->text_keys)
		merge_texts(a, b);
	append_rows(a, b->rows, b->n_rows);
	/* the peak: both states and b's serialized form, still in memory */
	account(a, (double) b->wire_bytes);
	fit_state_free(b);
	check_growing(a);
	PG_RETURN_POINTER(a);
}

PG_FUNCTION_INFO_V1(affinity_fit_serialfn);

/* Partial state -> bytea: options, counters, the rows, then the texts and their hash key. */
Datum
affinity_fit_serialfn(PG_FUNCTION_ARGS)
{
	FitState   *st = (FitState *) PG_GETARG_POINTER(0);
	StringInfoData buf;
	bytea	   *out;
	double		bytes;

	if (st->serialized)
		elog(ERROR, "affinity.fit state serialized twice");
	bytes = (double) st->n_rows * sizeof(AffTriple) + 1024 +
		(st->text_keys ? (double) (st->user_texts->bytes + st->item_texts->bytes) +
		 4.0 * (text_dict_count(st->user_texts) + text_dict_count(st->item_texts)) : 0);

	if (bytes > (double) (MaxAllocSize - VARHDRSZ))
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("a parallel worker's share of affinity.fit is too large to pass on"),
				 errdetail("The worker holds " INT64_FORMAT " rows; a serialized state is at most 1 GB.",
						   st->n_rows),
				 errhint("Run the fit without parallel workers: SET max_parallel_workers_per_gather = 0.")));
	pq_begintypsend(&buf);
	enlargeStringInfo(&buf, (int) bytes);	/* one allocation, not doublings */
	/* which build wrote it (see affinity_library_tag) */
	pq_sendint32(&buf, FIT_STATE_MAGIC);
	pq_sendint64(&buf, (int64) affinity_library_tag);
	pq_sendint32(&buf, (int32) sizeof(FitOptions));
	pq_sendint8(&buf, st->have_options ? 1 : 0);
	pq_sendbytes(&buf, (const char *) &st->opts, sizeof(FitOptions));
	pq_sendint64(&buf, st->rows_read);
	pq_sendint64(&buf, st->rows_null);
	pq_sendint64(&buf, st->rows_zero);
	pq_sendint64(&buf, st->n_rows);
	/* rows as bytes: the state only travels between processes of one server */
	pq_sendbytes(&buf, (const char *) st->rows, sizeof(AffTriple) * st->n_rows);
	/* 0: no text side (yet); else the key type code */
	pq_sendint8(&buf, st->text_keys ? aff_keys_code(st->user_text, st->item_text) : 0);
	if (st->text_keys)
	{
		pq_sendint64(&buf, (int64) st->text_hash_key[0]);
		pq_sendint64(&buf, (int64) st->text_hash_key[1]);
		text_dict_serialize(&buf, st->user_texts);
		text_dict_serialize(&buf, st->item_texts);
	}
	out = pq_endtypsend(&buf);
	account(st, (double) VARSIZE(out));
	/*
	 * A serialized partial state is never used again (the leader combines
	 * its serialized form): free its rows and texts now rather than when
	 * the executor shuts the node down, so that the leader's own share is
	 * not held beside the states it combines.
	 */
	st->serialized = true;
	if (st->rows != NULL)
		pfree(st->rows);
	st->rows = NULL;
	st->n_rows = st->cap_rows = 0;
	if (st->text_keys)
		free_text_dicts(st);
	account(st, 0);
	PG_RETURN_BYTEA_P(out);
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
	st = fit_state_alloc(aggcxt);
	buf.data = VARDATA_ANY(b);
	buf.len = VARSIZE_ANY_EXHDR(b);
	buf.maxlen = 0;
	buf.cursor = 0;
	if (buf.len < 16 || (uint32) pq_getmsgint(&buf, 4) != FIT_STATE_MAGIC)
		elog(ERROR, "invalid serialized affinity.fit state");
	{
		uint64		tag = (uint64) pq_getmsgint64(&buf);
		int			opts_size = pq_getmsgint(&buf, 4);

		if (tag != affinity_library_tag || opts_size != (int) sizeof(FitOptions))
			ereport(ERROR,
					(errcode(ERRCODE_OBJECT_NOT_IN_PREREQUISITE_STATE),
					 errmsg("a parallel worker of affinity.fit runs another build of the affinity library"),
					 errdetail("The library file was installed again after this session loaded it "
							   "(file tag %016llx here, %016llx in the worker).",
							   (unsigned long long) affinity_library_tag,
							   (unsigned long long) tag),
					 errhint("Reconnect to load the installed build, or run the fit without parallel "
							 "workers: SET max_parallel_workers_per_gather = 0.")));
	}
	st->have_options = pq_getmsgbyte(&buf) != 0;
	memcpy(&st->opts, pq_getmsgbytes(&buf, sizeof(FitOptions)), sizeof(FitOptions));
	st->rows_read = pq_getmsgint64(&buf);
	st->rows_null = pq_getmsgint64(&buf);
	st->rows_zero = pq_getmsgint64(&buf);
	n = pq_getmsgint64(&buf);
	if (n < 0 || n > (buf.len - buf.cursor) / (int64) sizeof(AffTriple))
		elog(ERROR, "invalid serialized affinity.fit state");
	{
		const char *src = n > 0 ? pq_getmsgbytes(&buf, sizeof(AffTriple) * n) : NULL;
		int			kt = pq_getmsgbyte(&buf);

		if (kt != 0 && (!aff_keys_valid(kt) || kt == AFF_KEYS_BIGINT))
			elog(ERROR, "invalid serialized affinity.fit state");
		st->text_keys = kt != 0;
		st->user_text = aff_keys_side_text(kt, true);
		st->item_text = aff_keys_side_text(kt, false);
		if (n > 0 && !st->text_keys)
		{
			/*
			 * Bigint keys: the rows stay where they are, in the bytes the
			 * deserialized state is combined from in the same call; the
			 * combine copies them (only through memcpy: they may be
			 * unaligned).  Text keys are rewritten in place by the combine,
			 * so they get a copy of their own.
			 */
			st->rows = (AffTriple *) src;
			st->rows_borrowed = true;
			st->n_rows = st->cap_rows = n;
		}
		else if (n > 0)
		{
			reserve_rows(st, n);
			memcpy(st->rows, src, sizeof(AffTriple) * n);
			st->n_rows = n;
		}
	}
	if (st->text_keys)
	{
		st->text_hash_key[0] = (uint64) pq_getmsgint64(&buf);
		st->text_hash_key[1] = (uint64) pq_getmsgint64(&buf);
		st->user_texts = text_dict_deserialize(&buf, st->cxt, st->text_hash_key);
		st->item_texts = text_dict_deserialize(&buf, st->cxt, st->text_hash_key);
		count_text_memory(st);
	}
	pq_getmsgend(&buf);
	st->wire_bytes = VARSIZE_ANY(b);
	held_wire += (double) st->wire_bytes;	/* the queue's buffer */
	account(st, (double) st->wire_bytes);	/* and the tuple read from it */
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
/*
 * Text keys: the dictionaries as they are held (texts, entries, hash
 * tables), plus one more copy of the texts and their offsets, for the
 * layout of the model's sections while the dictionaries still exist, or
 * later the model and the executor's copy of it.
 */
static double
text_bytes_needed(const FitState *st)
{
	double		n;

	if (!st->text_keys || st->user_texts == NULL)
		return 0;
	n = (double) (text_dict_count(st->user_texts) + text_dict_count(st->item_texts));
	return (double) st->text_memory +
		(double) (st->user_texts->bytes + st->item_texts->bytes) + 8.0 * n;
}

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
		+ 2.0 * (n_rows * 8.0 + entities * 16.0)	/* training lists in two copies */
		+ text_bytes_needed(st);
}

/*
 * Refuse the fit when the estimate passes affinity.max_fit_memory, through
 * the engine's one memory guard (the methods' own checks use it too).
 */
static void
check_memory(const FitState *st, double n_rows, double users, double items,
			 bool with_factors)
{
	AffFitMemory need;
	AffError	err;

	memset(&need, 0, sizeof(need));
	need.bytes = estimate_fit_bytes(st, n_rows, users, items, with_factors);
	need.step = with_factors ? "Fitting" : "Collecting the rows";
	need.interactions = n_rows;
	need.users = users;
	need.items = items;
	need.at_most = !with_factors;
	need.remedy = "lower factors, or fit on fewer rows";
	if (st->text_keys && st->user_texts != NULL)
	{
		need.text_keys = text_dict_count(st->user_texts) + text_dict_count(st->item_texts);
		need.text_bytes = (double) (st->user_texts->bytes + st->item_texts->bytes);
		need.text_held_bytes = (double) st->text_memory;
		need.remedy = "map long text keys to shorter ones, or fit on fewer rows";
	}
	if (aff_fit_memory_guard((double) affinity_max_fit_memory_mb * 1024.0 * 1024.0,
							 "affinity.max_fit_memory", &need, &err) != AFF_OK)
		raise_engine_error(&err);
}

/*
 * Header fields and common sections (the engine's aff_fit_header), then
 * what only the aggregate knows: the rows it read and skipped.
 */
static void
fill_header(AffModelParts *parts, const FitState *st, const AffMatrix *m)
{
	AffModelHeader *h = &parts->h;

	aff_fit_header(parts, &st->opts, m,
				   st->text_keys ? aff_keys_code(st->user_text, st->item_text) : AFF_KEYS_BIGINT);
	h->rows_read = st->rows_read;
	h->rows_skipped_null = st->rows_null;
	h->rows_skipped_zero = st->rows_zero;
}

/*
 * The text dictionaries of the text sides of a fit, in the matrix's key
 * order (a bigint side has no text sections).
 */
static void
add_text_sections(FitState *st, const AffMatrix *m, AffModelParts *parts)
{
	int64	   *off;
	char	   *bytes;
	uint64		len;

	if (st->user_text)
	{
		text_dict_layout(st->user_texts, m->user_keys, m->n_users, &off, &bytes, &len);
		parts->data[AFF_SEC_USER_TEXT_OFF] = off;
		parts->count[AFF_SEC_USER_TEXT_OFF] = m->n_users + 1;
		parts->data[AFF_SEC_USER_TEXT] = bytes;
		parts->count[AFF_SEC_USER_TEXT] = len;
	}
	if (!st->item_text)
		return;
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

/*
 * The fit's memory as PostgreSQL accounts it: bytes allocated in the fit
 * states of the backend (rows, text dictionaries, later the model: see
 * held_total) and in the fit's work context (matrix, scratch, factors,
 * sections), with the highest sum seen, starting from the peak of
 * collecting and combining the rows.  The engine's allocator samples it after every
 * allocation, so transient scratch (the radix sort's second buffer) is in
 * the peak; large allocations are blocks of their own that are returned to
 * the system when freed, so the sum follows what the process holds.
 */
typedef struct FitMeter
{
	AffAllocator inner;			/* the work context's allocator */
	FitState   *st;
	MemoryContext work;
	double		peak;
} FitMeter;

static double
meter_sample(FitMeter *fm)
{
	double		now;

	account(fm->st, 0);
	now = (double) held_total + held_wire + (double) MemoryContextMemAllocated(fm->work, true);

	fm->peak = Max(fm->peak, now);
	return now;
}

static void *
metered_alloc(void *ctx, size_t size)
{
	FitMeter   *fm = ctx;
	void	   *p = fm->inner.alloc(fm->inner.ctx, size);

	if (p != NULL)
		meter_sample(fm);
	return p;
}

static void
metered_release(void *ctx, void *ptr)
{
	FitMeter   *fm = ctx;

	fm->inner.release(fm->inner.ctx, ptr);
}

/* An allocator on the work context that keeps fm's peak. */
static AffAllocator
metered_allocator(FitMeter *fm, FitState *st, MemoryContext work)
{
	AffAllocator a;

	fm->inner = context_allocator(work);
	fm->st = st;
	fm->work = work;
	fm->peak = held_peak;		/* collecting and combining the rows */
	meter_sample(fm);
	a.alloc = metered_alloc;
	a.release = metered_release;
	a.ctx = fm;
	return a;
}

/*
 * Sort, merge and index the rows into m, stopping on a cancel; the rows
 * are freed afterwards.  The item index's hash key is drawn here, so that
 * nobody can choose ids that crowd its slots.
 */
static void
build_matrix(FitState *st, const AffAllocator *a, AffMatrix *m)
{
	AffBuildParams bp;
	AffError	err;

	/* no slack beyond the last row: the build touches every byte it holds */
	if (st->cap_rows > st->n_rows)
	{
		st->rows = repalloc_huge(st->rows, sizeof(AffTriple) * st->n_rows);
		st->cap_rows = st->n_rows;
	}
	bp.min_user = st->opts.min_user_interactions;
	bp.min_item = st->opts.min_item_interactions;
	draw_hash_key(bp.index_key);
	bp.poll = engine_poll;
	bp.poll_arg = NULL;
	engine_check(aff_matrix_build(st->rows, st->n_rows, &bp, a, m, &err), &err);
}

/* The text dictionaries, once laid out in the model's sections. */
static void
free_text_dicts(FitState *st)
{
	text_dict_free(st->user_texts);
	text_dict_free(st->item_texts);
	st->user_texts = st->item_texts = NULL;
	st->text_memory = 0;
}

/* The whole final step; returns the model allocated in st->cxt. */
static bytea *
fit_model(FitState *st)
{
	MemoryContext work = AllocSetContextCreate(CurrentMemoryContext,
											   "affinity fit",
											   ALLOCSET_DEFAULT_SIZES);
	MemoryContext old = MemoryContextSwitchTo(work);
	FitMeter	meter;
	AffAllocator a = metered_allocator(&meter, st, work);
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
	/* with item profiles, the texts take the profiles' hash key */
	if (st->profiles != NULL && st->text_keys)
	{
		uint64		key[2];

		fit_profiles_hash_key(st->profiles, key);
		if (key[0] != st->text_hash_key[0] || key[1] != st->text_hash_key[1])
			rekey_texts_under(st, key);
	}
	/* users and items are at most the rows until the matrix says */
	check_memory(st, st->n_rows, Min(st->n_rows, AFF_MAX_ENTITIES),
				 Min(st->n_rows, AFF_MAX_ENTITIES), false);
	build_matrix(st, &a, &m);
	check_memory(st, m.nnz, m.n_users, m.n_items, true);
	/* the rows are not needed any more */
	meter_sample(&meter);
	pfree(st->rows);
	st->rows = NULL;
	st->n_rows = st->cap_rows = 0;

	fill_header(&parts, st, &m);
	if (st->text_keys)
	{
		parts.h.text_hash_key[0] = st->text_hash_key[0];
		parts.h.text_hash_key[1] = st->text_hash_key[1];
		add_text_sections(st, &m, &parts);
		meter_sample(&meter);
		free_text_dicts(st);
	}
	parts.data[AFF_SEC_POPULARITY] = item_popularity(&m);
	parts.count[AFF_SEC_POPULARITY] = m.n_items;
	if (st->profiles != NULL)
		fit_profiles_attach(st->profiles, &m, &parts, &a);
	method_fit(&m, &st->opts, &a, &parts);

	show_phase("affinity.fit writing the model");
	parts.h.fit_seconds = seconds_since(t0);
	{
		uint64		model_bytes = 0;
		double		now = meter_sample(&meter);
		double		state_now = (double) held_total + held_wire;

		/*
		 * Still to come: the model beside the work context, then, once the
		 * work context is gone, the executor's copy beside the model.
		 */
		(void) aff_model_size(&parts, &model_bytes, &err);
		peak = Max(meter.peak, now + model_bytes);
		peak = Max(peak, state_now + 2.0 * model_bytes);
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
