/*
 * sequences.c
 *		The affinity.fit_sequences aggregate (ordered events -> a model value
 *		of method sequential_rules, core/method_sequences.c) and its serving
 *		functions: next_items for one session and next_items_for_all for
 *		many; and the refusal of the functions that such a value cannot
 *		serve.
 *
 * Rows are (sequence, item, position [, options]).  Sequence and item keys
 * are bigint or text, read from the call's argument types; the position is
 * bigint (an integer column is cast to it), timestamp or timestamptz, kept
 * as its int64 value (microseconds for timestamps), so it orders the
 * events of a sequence exactly.  Every text becomes a SipHash key under one
 * random key that the state draws (the header's text_hash_key), as the
 * fit's text keys do (fit_agg.c); two texts that share a key make the
 * state draw another and re-key.  The memory the state holds and the build
 * will need is checked against affinity.max_fit_memory as the state grows.
 * A row with a NULL sequence, item or position is skipped and counted.
 *
 * The build sorts the events, so the order in which rows arrive never
 * matters.  The aggregate has no combine function, so PostgreSQL never
 * splits it across parallel workers (a parallel scan below it still feeds
 * the one state): merging two states would have to re-key the text
 * dictionaries of one of them, and the build's sort, not the transition,
 * is the larger part of the work.
 */
#include "serving_common.h"

#include <math.h>

#include "catalog/pg_type.h"
#include "common/pg_prng.h"
#include "funcapi.h"
#include "miscadmin.h"
#include "utils/array.h"
#include "utils/builtins.h"
#include "utils/lsyscache.h"
#include "utils/memutils.h"
#include "utils/timestamp.h"

#include "../core/sequences.h"
#include "../core/serve.h"
#include "text_keys.h"

#define MAX_REKEY_TRIES 8

typedef struct SeqState
{
	MemoryContext cxt;			/* holds the state and all it owns */
	bool		text_seqs;
	bool		text_items;
	int			position_type;	/* AFF_POSITION_* */
	bool		opts_done;
	FitOptions	opts;
	uint64		hash_key[2];
	TextDict   *seqs;			/* text sequence keys, or NULL */
	TextDict   *items;			/* text item keys, or NULL */
	AffEvent   *ev;
	int64		n;
	int64		cap;
	int64		rows_read;
	int64		rows_null;
	bytea	   *result;			/* the value, once built */
} SeqState;

static void
draw_key(uint64 key[2])
{
	do
	{
		if (!pg_strong_random(key, sizeof(uint64) * 2))
			ereport(ERROR,
					(errcode(ERRCODE_INTERNAL_ERROR),
					 errmsg("could not generate a random hash key for affinity.fit_sequences")));
	} while (key[0] == 0 && key[1] == 0);
}

/* Bytes the state holds and the build will need besides. */
static double
state_need(const SeqState *st, int64 cap)
{
	double		texts = 0;

	if (st->seqs)
		texts += (double) text_dict_memory(st->seqs);
	if (st->items)
		texts += (double) text_dict_memory(st->items) + 2.0 * st->items->bytes;
	return (double) cap * sizeof(AffEvent) + aff_sequences_build_bytes(st->n) + texts;
}

/* Refuse to go on past affinity.max_fit_memory. */
static void
check_memory(const SeqState *st, int64 cap)
{
	double		limit = (double) affinity_max_fit_memory_mb * 1024.0 * 1024.0;
	double		need = state_need(st, cap);

	if (limit <= 0 || need <= limit)
		return;
	ereport(ERROR,
			(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
			 errmsg("affinity.fit_sequences would need about %.0f MB, over affinity.max_fit_memory",
					need / (1024.0 * 1024.0)),
			 errdetail("Collecting " INT64_FORMAT " events%s; affinity.max_fit_memory is %d MB.",
					   st->n, st->items ? psprintf(" of " INT64_FORMAT " distinct items",
												   text_dict_count(st->items)) : "",
					   affinity_max_fit_memory_mb),
			 errhint("Raise affinity.max_fit_memory, or keep fewer events in the query (recent ones, for example).")));
}

/*
 * The options: "method" (only "sequential_rules" so far), "window" and
 * "successors"; an option of affinity.fit that does not apply is refused,
 * naming it.
 */
static void
parse_options(Jsonb *j, FitOptions *o)
{
	JsonbIterator *it;
	JsonbValue	v;
	JsonbIteratorToken tok;
	char	   *key = NULL;

	fit_options_parse(NULL, o);
	if (j == NULL)
		return;
	if (!JB_ROOT_IS_OBJECT(j))
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("affinity.fit_sequences options must be a jsonb object"),
				 errhint("Write them like '{\"window\": 5, \"successors\": 50}'.")));
	it = JsonbIteratorInit(&j->root);
	while ((tok = JsonbIteratorNext(&it, &v, true)) != WJB_DONE)
	{
		bool		deprecated;
		const AffOptionDef *d;

		if (tok == WJB_KEY)
		{
			key = pnstrdup(v.val.string.val, v.val.string.len);
			continue;
		}
		if (tok != WJB_VALUE)
			continue;
		if (strcmp(key, "method") == 0)
		{
			if (v.type != jbvString || v.val.string.len != strlen("sequential_rules") ||
				strncmp(v.val.string.val, "sequential_rules", v.val.string.len) != 0)
				ereport(ERROR,
						(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
						 errmsg("invalid value for affinity.fit_sequences option \"method\""),
						 errdetail("The value given is %s.",
								   v.type == jbvString ?
								   psprintf("\"%.*s\"", v.val.string.len, v.val.string.val) :
								   "not a string"),
						 errhint("\"method\" takes \"sequential_rules\".")));
			continue;
		}
		d = aff_option_by_name(key, strlen(key), &deprecated);
		if (d == NULL || !(aff_method_sequential_rules.options & AFF_OPT_BIT(d->id)))
			ereport(ERROR,
					(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
					 errmsg("option \"%s\" does not apply to affinity.fit_sequences", key),
					 errhint("affinity.fit_sequences takes \"method\", \"window\" and \"successors\".")));
		fit_option_set(o, key, &v, "affinity.fit_sequences");
	}
}

static SeqState *
get_state(FunctionCallInfo fcinfo)
{
	MemoryContext aggcxt;
	SeqState   *st;
	MemoryContext cxt;
	Oid			pt;

	if (!AggCheckCallContext(fcinfo, &aggcxt))
		elog(ERROR, "affinity.fit_sequences transition called in non-aggregate context");
	if (!PG_ARGISNULL(0))
		return (SeqState *) PG_GETARG_POINTER(0);
	cxt = AllocSetContextCreate(aggcxt, "affinity fit_sequences", ALLOCSET_DEFAULT_SIZES);
	st = MemoryContextAllocZero(cxt, sizeof(SeqState));
	st->cxt = cxt;
	st->text_seqs = get_fn_expr_argtype(fcinfo->flinfo, 1) == TEXTOID;
	st->text_items = get_fn_expr_argtype(fcinfo->flinfo, 2) == TEXTOID;
	pt = get_fn_expr_argtype(fcinfo->flinfo, 3);
	if (pt == INT8OID)
		st->position_type = AFF_POSITION_NUMBER;
	else if (pt == TIMESTAMPOID)
		st->position_type = AFF_POSITION_TIMESTAMP;
	else if (pt == TIMESTAMPTZOID)
		st->position_type = AFF_POSITION_TIMESTAMPTZ;
	else
		ereport(ERROR,
				(errcode(ERRCODE_DATATYPE_MISMATCH),
				 errmsg("affinity.fit_sequences positions must be bigint, timestamp or timestamptz"),
				 errdetail("The position has type %s.", format_type_be(pt)),
				 errhint("Cast the position, for example position::bigint.")));
	draw_key(st->hash_key);
	if (st->text_seqs)
		st->seqs = text_dict_create(cxt);
	if (st->text_items)
		st->items = text_dict_create(cxt);
	return st;
}

/* Re-key both dictionaries under a new key and remap the events. */
static void
rekey(SeqState *st)
{
	uint64		key[2];
	int64		i;
	int			tries;

	for (tries = 0;; tries++)
	{
		if (tries == MAX_REKEY_TRIES)
			elog(ERROR, "texts of affinity.fit_sequences collide under %d random hash keys",
				 MAX_REKEY_TRIES);
		draw_key(key);
		if (st->seqs && !text_dict_rekey(st->seqs, key))
			continue;
		if (st->items && !text_dict_rekey(st->items, key))
		{
			if (st->seqs)
				text_dict_rekey_abort(st->seqs);
			continue;
		}
		break;
	}
	for (i = 0; i < st->n; i++)
	{
		if ((i & 0xffff) == 0xffff)
			CHECK_FOR_INTERRUPTS();
		if (st->seqs)
			st->ev[i].seq = text_dict_mapped(st->seqs, st->ev[i].seq);
		if (st->items)
			st->ev[i].item = text_dict_mapped(st->items, st->ev[i].item);
	}
	if (st->seqs)
		text_dict_rekey_finish(st->seqs);
	if (st->items)
		text_dict_rekey_finish(st->items);
	st->hash_key[0] = key[0];
	st->hash_key[1] = key[1];
}

/* The int64 keys of the row's sequence and item (texts through their dictionaries). */
static void
row_keys(FunctionCallInfo fcinfo, SeqState *st, int64 *sk, int64 *ik)
{
	text	   *s = st->text_seqs ? PG_GETARG_TEXT_PP(1) : NULL;
	text	   *it = st->text_items ? PG_GETARG_TEXT_PP(2) : NULL;
	int64		before = (st->seqs ? text_dict_count(st->seqs) : 0) +
		(st->items ? text_dict_count(st->items) : 0);
	MemoryContext old;

	if (s == NULL)
		*sk = PG_GETARG_INT64(1);
	if (it == NULL)
		*ik = PG_GETARG_INT64(2);
	if (s == NULL && it == NULL)
		return;
	old = MemoryContextSwitchTo(st->cxt);
	for (;;)
	{
		bool		collision = false;

		if (s != NULL)
			*sk = text_dict_add(st->seqs, st->hash_key, VARDATA_ANY(s),
								VARSIZE_ANY_EXHDR(s), &collision);
		if (!collision && it != NULL)
			*ik = text_dict_add(st->items, st->hash_key, VARDATA_ANY(it),
								VARSIZE_ANY_EXHDR(it), &collision);
		if (!collision)
			break;
		rekey(st);
	}
	MemoryContextSwitchTo(old);
	if ((st->seqs ? text_dict_count(st->seqs) : 0) +
		(st->items ? text_dict_count(st->items) : 0) != before)
		check_memory(st, st->cap);
}

/* Room for one more event. */
static void
reserve_event(SeqState *st)
{
	int64		cap;

	if (st->n < st->cap)
		return;
	cap = st->cap == 0 ? 1024 : st->cap * 2;
	if (cap > AFF_MAX_ENTITIES)
		cap = AFF_MAX_ENTITIES;
	if (st->n >= cap)
		ereport(ERROR,
				(errcode(ERRCODE_PROGRAM_LIMIT_EXCEEDED),
				 errmsg("affinity.fit_sequences received too many events"),
				 errdetail("It holds " INT64_FORMAT " events, the most one value can take.", st->n)));
	check_memory(st, cap);
	if (st->ev == NULL)
		st->ev = MemoryContextAllocHuge(st->cxt, sizeof(AffEvent) * cap);
	else
		st->ev = repalloc_huge(st->ev, sizeof(AffEvent) * cap);
	st->cap = cap;
}

PG_FUNCTION_INFO_V1(affinity_fit_sequences_transfn);

/*
 * (state, sequence bigint|text, item bigint|text, position bigint|
 * timestamp|timestamptz [, options]): one event.
 */
Datum
affinity_fit_sequences_transfn(PG_FUNCTION_ARGS)
{
	SeqState   *st = get_state(fcinfo);
	int64		sk = 0;
	int64		ik = 0;

	if (st->result != NULL)
		elog(ERROR, "affinity.fit_sequences state used after its final step");
	if (!st->opts_done)
	{
		parse_options(PG_NARGS() > 4 && !PG_ARGISNULL(4) ? PG_GETARG_JSONB_P(4) : NULL,
					  &st->opts);
		st->opts_done = true;
	}
	st->rows_read++;
	if (PG_ARGISNULL(1) || PG_ARGISNULL(2) || PG_ARGISNULL(3))
	{
		st->rows_null++;
		PG_RETURN_POINTER(st);
	}
	row_keys(fcinfo, st, &sk, &ik);
	reserve_event(st);
	st->ev[st->n].seq = sk;
	st->ev[st->n].item = ik;
	/* Timestamp, TimestampTz and int8 are all an int64 Datum */
	st->ev[st->n].pos = PG_GETARG_INT64(3);
	st->n++;
	PG_RETURN_POINTER(st);
}

static bytea *
build_value(SeqState *st)
{
	static const int64 zero_off[1] = {0};
	MemoryContext work = AllocSetContextCreate(CurrentMemoryContext, "affinity fit_sequences build",
											   ALLOCSET_DEFAULT_SIZES);
	MemoryContext old = MemoryContextSwitchTo(work);
	AffAllocator a = context_allocator(work);
	AffSeqParams p;
	AffSeqBuild out;
	AffModelParts parts;
	AffError	err;
	AffStatus	rc;
	instr_time	t0;
	bytea	   *value;

	INSTR_TIME_SET_CURRENT(t0);
	memset(&parts, 0, sizeof(parts));
	memset(&p, 0, sizeof(p));
	p.window = st->opts.window;
	p.successors = st->opts.successors;
	p.position_type = st->position_type;
	p.memory_limit = (double) affinity_max_fit_memory_mb * 1024.0 * 1024.0;
	p.held_bytes = (double) st->cap * sizeof(AffEvent) +
		(st->seqs ? (double) text_dict_memory(st->seqs) : 0) +
		(st->items ? (double) text_dict_memory(st->items) : 0);
	p.poll = engine_poll;
	rc = aff_sequences_build(st->ev, st->n, &p, &a, &parts, &out, &err);
	engine_check(rc, &err);

	parts.h.key_type = st->text_items ? AFF_KEYS_TEXT : AFF_KEYS_BIGINT;
	/* the sequence texts are not kept: only text items need the key */
	if (st->text_items)
	{
		parts.h.text_hash_key[0] = st->hash_key[0];
		parts.h.text_hash_key[1] = st->hash_key[1];
	}
	parts.h.rows_read = st->rows_read;
	parts.h.rows_skipped_null = st->rows_null;
	parts.h.duplicates_summed = out.repeats_merged;
	if (st->text_items)
	{
		int64	   *off;
		char	   *bytes;
		uint64		len;

		parts.data[AFF_SEC_USER_TEXT_OFF] = zero_off;
		parts.count[AFF_SEC_USER_TEXT_OFF] = 1;
		parts.data[AFF_SEC_USER_TEXT] = zero_off;
		parts.count[AFF_SEC_USER_TEXT] = 0;
		text_dict_layout(st->items, out.item_keys, out.n_items, &off, &bytes, &len);
		parts.data[AFF_SEC_ITEM_TEXT_OFF] = off;
		parts.count[AFF_SEC_ITEM_TEXT_OFF] = (uint64) out.n_items + 1;
		parts.data[AFF_SEC_ITEM_TEXT] = bytes;
		parts.count[AFF_SEC_ITEM_TEXT] = len;
	}
	parts.h.fit_seconds = seconds_since(t0);
	MemoryContextSwitchTo(st->cxt);
	value = model_build(&parts);
	MemoryContextSwitchTo(old);
	MemoryContextDelete(work);
	return value;
}

PG_FUNCTION_INFO_V1(affinity_fit_sequences_finalfn);

Datum
affinity_fit_sequences_finalfn(PG_FUNCTION_ARGS)
{
	SeqState   *st;

	if (!AggCheckCallContext(fcinfo, NULL))
		elog(ERROR, "affinity_fit_sequences_finalfn called in non-aggregate context");
	if (PG_ARGISNULL(0))
		ereport(ERROR,
				(errcode(ERRCODE_DATA_EXCEPTION),
				 errmsg("affinity.fit_sequences received no rows"),
				 errhint("Check the query that feeds it; rules need events of at least one sequence.")));
	st = (SeqState *) PG_GETARG_POINTER(0);
	if (st->result == NULL)
	{
		if (st->n == 0)
			ereport(ERROR,
					(errcode(ERRCODE_DATA_EXCEPTION),
					 errmsg("affinity.fit_sequences received no usable rows"),
					 errdetail("Of " INT64_FORMAT " rows, " INT64_FORMAT " had a NULL sequence, item or position.",
							   st->rows_read, st->rows_null),
					 errhint("Rules need events with a sequence, an item and a position.")));
		st->result = build_value(st);
		/* the events are not needed any more (the build sorted them) */
		pfree(st->ev);
		st->ev = NULL;
		st->n = st->cap = 0;
	}
	PG_RETURN_POINTER(st->result);
}

/* Serving ------------------------------------------------------------- */

static const int64_t *
sequence_info(const AffModelView *v)
{
	return (const int64_t *) v->sections[AFF_SEC_SEQUENCE_INFO];
}

/*
 * Refuse to serve a rules value from function fn: it relates items to the
 * items that follow them and knows no users.
 */
void
refuse_sequences(const AffModelView *v, const char *fn)
{
	const int64_t *info = sequence_info(v);

	ereport(ERROR,
			(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
			 errmsg("%s cannot serve sequential rules", fn),
			 errdetail("The value is a sequential_rules value of " INT64_FORMAT " items from " INT64_FORMAT " sequences: rules from an item to the next, without users.",
					   v->h->n_items, info ? info[AFF_SINFO_SEQUENCES] : 0),
			 errhint("Use affinity.next_items for the next items of a session, affinity.items_like for the successors of one item.")));
}

/* A rules value, or an error for a model of another method. */
static CachedModel *
rules_model(FunctionCallInfo fcinfo, const char *fn)
{
	CachedModel *e = model_get(fcinfo, 0);

	if (e->view.h->method != AFF_METHOD_SEQUENTIAL_RULES)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("%s needs a model of ordered events", fn),
				 errdetail("This model was fitted with method \"%s\", which knows no order of items.",
						   aff_method_name(e->view.h->method)),
				 errhint("Fit one with affinity.fit_sequences; for the items that go with a cart, use affinity.top_items(model, basket).")));
	return e;
}

/* A recent event: its item index (-1 unknown), position and place in the array. */
typedef struct RecentEvent
{
	int32		idx;
	int64		pos;
	int			at;
} RecentEvent;

static int
cmp_recent(const void *a, const void *b)
{
	const RecentEvent *x = a;
	const RecentEvent *y = b;

	if (x->pos != y->pos)
		return x->pos < y->pos ? -1 : 1;
	return x->at < y->at ? -1 : x->at > y->at;
}

/*
 * The recent items of a session as the rule scores them: ev[0 .. n) (NULL
 * elements left out already), in array order, or by position when
 * with_pos (equal positions are one step, as in the fit).  The last step
 * counts fully and the one j steps back 1 / j, up to the window; an
 * unknown item still takes its step.  Fills out_idx (ascending, without
 * repeats) and out_w (weights summed for a recurring item); returns their
 * count.
 */
static int
cmp_int32_asc(const void *a, const void *b)
{
	int32		x = *(const int32 *) a;
	int32		y = *(const int32 *) b;

	return x < y ? -1 : x > y;
}

static int
recent_weights(RecentEvent *ev, int n, bool with_pos, int window, float *wacc,
			   int32 *out_idx, float *out_w)
{
	int			m = 0;
	int			j = 0;
	int			i;

	if (with_pos)
		qsort(ev, n, sizeof(RecentEvent), cmp_recent);
	for (i = n - 1; i >= 0; i--)
	{
		if (i == n - 1 || !with_pos || ev[i].pos != ev[i + 1].pos)
			j++;
		if (j > window)
			break;
		if (ev[i].idx < 0)
			continue;
		/* wacc (all zero between calls) sums the weights of a recurring item */
		if (wacc[ev[i].idx] == 0)
			out_idx[m++] = ev[i].idx;
		wacc[ev[i].idx] += 1.0f / (float) j;
	}
	qsort(out_idx, m, sizeof(int32), cmp_int32_asc);
	for (i = 0; i < m; i++)
	{
		out_w[i] = wacc[out_idx[i]];
		wacc[out_idx[i]] = 0;
	}
	return m;
}

/* What a ranking of next items shares across sessions: the filters and buffers. */
typedef struct NextRanking
{
	const AffModelView *v;
	AffServe	s;
	AffAllocator a;
	int64		k;
	int			window;
	uint8	   *excluded;		/* n_items mask of the exclude argument */
	AffItemFilter flt;			/* its skip is rebuilt per session */
	uint8	   *skip;
	float	   *scores;
	int32	   *ridx;			/* the recent items' indices and weights */
	float	   *rw;
	int			cap;			/* room in ridx and rw */
	float	   *wacc;			/* n_items, zero between sessions */
	AffScored  *heap;
} NextRanking;

static void
ranking_init(FunctionCallInfo fcinfo, NextRanking *r, CachedModel *e, int64 k,
			 int argno_exclude, int argno_cand)
{
	const AffModelView *v = &e->view;
	int64		n = v->h->n_items;

	memset(r, 0, sizeof(*r));
	r->v = v;
	r->k = k;
	r->window = (int) sequence_info(v)[AFF_SINFO_WINDOW];
	serve_context(e, &r->s, &r->a, 0);
	r->excluded = palloc0(n);
	if (!PG_ARGISNULL(argno_exclude))
	{
		int			ne;
		int32	   *idx = array_key_indices(fcinfo, argno_exclude, v, false, &ne);
		int			i;

		for (i = 0; i < ne; i++)
			r->excluded[idx[i]] = 1;
	}
	if (!PG_ARGISNULL(argno_cand))
	{
		int			nc;

		r->flt.cand = array_key_indices(fcinfo, argno_cand, v, false, &nc);
		r->flt.n_cand = nc;
	}
	r->skip = palloc(n);
	r->wacc = palloc_extended(sizeof(float) * n, MCXT_ALLOC_HUGE | MCXT_ALLOC_ZERO);
	r->flt.skip = r->skip;
	r->scores = palloc_extended(sizeof(float) * n, MCXT_ALLOC_HUGE);
	r->heap = palloc(sizeof(AffScored) * Max(k, 1));
}

/*
 * Rank the next items after the recent events ev[0 .. n) into t (see
 * recent_weights): only items that follow one of them score above zero,
 * and only those are ranked.  who names the request in an error.
 */
static void
rank_next(NextRanking *r, RecentEvent *ev, int n, bool with_pos, AffTopK *t, const char *who)
{
	const AffMethod *meth = model_method(r->v);
	int64		n_items = r->v->h->n_items;
	AffError	err;
	int			m;
	int64		j;
	int64		bad;

	if (n > r->cap)
	{
		r->cap = Max(n, 2 * r->cap);
		r->ridx = r->ridx ? repalloc(r->ridx, sizeof(int32) * r->cap) :
			palloc(sizeof(int32) * r->cap);
		r->rw = r->rw ? repalloc(r->rw, sizeof(float) * r->cap) :
			palloc(sizeof(float) * r->cap);
	}
	m = recent_weights(ev, n, with_pos, r->window, r->wacc, r->ridx, r->rw);
	aff_topk_init(t, r->heap, r->k);
	if (m == 0)
		return;
	if (meth->basket_scores(&r->s, r->ridx, r->rw, m, r->scores, &err) != AFF_OK)
		raise_engine_error(&err);
	for (j = 0; j < n_items; j++)
		r->skip[j] = r->excluded[j] || r->scores[j] == 0;
	bad = aff_topk_scores(r->scores, n_items, &r->flt, t);
	check_finite_scores(r->v, false, bad, who);
}

/*
 * The events of the key array argument argno (one-dimensional) with the
 * positions of argument argno_pos (bigint[] of the same length, or NULL):
 * ev[i] for element i, its item index (-1 unknown, -2 NULL element).
 */
static RecentEvent *
array_events(FunctionCallInfo fcinfo, int argno, int argno_pos, const AffModelView *v,
			 int *n_out, bool *with_pos, const char *what)
{
	ArrayType  *arr = PG_GETARG_ARRAYTYPE_P(argno);
	bool		text_call = require_array_keys(fcinfo, argno, v, false);
	Datum	   *elems;
	bool	   *nulls;
	Datum	   *pe = NULL;
	bool	   *pn = NULL;
	int			np = 0;
	int			n;
	RecentEvent *ev;
	int			i;

	if (ARR_NDIM(arr) > 1)
		ereport(ERROR,
				(errcode(ERRCODE_ARRAY_SUBSCRIPT_ERROR),
				 errmsg("%s must be a one-dimensional array", what),
				 errdetail("The array has %d dimensions.", ARR_NDIM(arr))));
	if (text_call)
		deconstruct_array(arr, TEXTOID, -1, false, TYPALIGN_INT, &elems, &nulls, &n);
	else
		deconstruct_array(arr, INT8OID, 8, true, TYPALIGN_DOUBLE, &elems, &nulls, &n);
	*with_pos = argno_pos < PG_NARGS() && !PG_ARGISNULL(argno_pos);
	if (*with_pos)
	{
		deconstruct_array(PG_GETARG_ARRAYTYPE_P(argno_pos), INT8OID, 8, true, TYPALIGN_DOUBLE,
						  &pe, &pn, &np);
		if (np != n)
			ereport(ERROR,
					(errcode(ERRCODE_ARRAY_SUBSCRIPT_ERROR),
					 errmsg("the positions must be as many as %s", what),
					 errdetail("There are %d items and %d positions.", n, np),
					 errhint("Give one position per item, or NULL for the array order.")));
	}
	ev = palloc(sizeof(RecentEvent) * (n + 1));
	for (i = 0; i < n; i++)
	{
		ev[i].idx = nulls[i] ? -2 : (int32) key_elem_index(v, false, elems[i], text_call);
		ev[i].at = i;
		ev[i].pos = 0;
		if (*with_pos)
		{
			if (pn[i] && !nulls[i])
				ereport(ERROR,
						(errcode(ERRCODE_NULL_VALUE_NOT_ALLOWED),
						 errmsg("a position of %s is NULL", what),
						 errdetail("Position %d of %d is NULL.", i + 1, n),
						 errhint("Give every item a position, or pass NULL positions for the array order.")));
			ev[i].pos = pn[i] ? 0 : DatumGetInt64(pe[i]);
		}
	}
	*n_out = n;
	return ev;
}

/* Leave out the NULL elements of ev[0 .. n); returns the count left. */
static int
drop_null_events(RecentEvent *ev, int n)
{
	int			m = 0;
	int			i;

	for (i = 0; i < n; i++)
		if (ev[i].idx != -2)
			ev[m++] = ev[i];
	return m;
}

PG_FUNCTION_INFO_V1(affinity_next_items);

/*
 * next_items(model, recent, k, exclude, candidates, positions) ->
 * (item_id, score, rank): the items most likely to come next after the
 * recent items of one session, in order (last = most recent), or ordered
 * by positions when given (equal positions: one step, a basket).
 */
Datum
affinity_next_items(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	NextRanking r;
	AffTopK		t;
	RecentEvent *ev;
	bool		with_pos;
	int			n;
	int64		k;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = rules_model(fcinfo, "next_items");
	check_output_keys(fcinfo, &e->view, 0, false);
	k = get_k(fcinfo, 2, e->view.h->n_items);
	ev = array_events(fcinfo, 1, 5, &e->view, &n, &with_pos, "the recent items");
	if (k == 0)
		return (Datum) 0;
	n = drop_null_events(ev, n);
	ranking_init(fcinfo, &r, e, k, 3, 4);
	rank_next(&r, ev, n, with_pos, &t, "the recent items");
	emit_topk(fcinfo, &t, &e->view, false, NULL);
	return (Datum) 0;
}

/* A batch event: its session key and its place in the arrays. */
typedef struct SessionEvent
{
	Datum		key;
	int			at;
} SessionEvent;

static bool sort_text_keys;

/* Session keys in order: int64, or text bytes (then length). */
static int
cmp_session_keys(Datum a, Datum b)
{
	if (sort_text_keys)
	{
		text	   *tx = DatumGetTextPP(a);
		text	   *ty = DatumGetTextPP(b);
		int			lx = VARSIZE_ANY_EXHDR(tx);
		int			ly = VARSIZE_ANY_EXHDR(ty);
		int			c = memcmp(VARDATA_ANY(tx), VARDATA_ANY(ty), Min(lx, ly));

		return c != 0 ? c : (lx < ly ? -1 : lx > ly);
	}
	return DatumGetInt64(a) < DatumGetInt64(b) ? -1 : DatumGetInt64(a) > DatumGetInt64(b);
}

static int
cmp_session_event(const void *a, const void *b)
{
	const SessionEvent *x = a;
	const SessionEvent *y = b;
	int			c = cmp_session_keys(x->key, y->key);

	if (c != 0)
		return c;
	return x->at < y->at ? -1 : x->at > y->at;
}

/* Emit the ranked rows of one session of the batch. */
static void
emit_session(FunctionCallInfo fcinfo, const AffModelView *v, Datum session, AffTopK *t)
{
	int64		got = aff_topk_finish(t);
	int64		rk;

	for (rk = 0; rk < got; rk++)
	{
		Datum		values[4];

		values[0] = session;
		values[1] = key_datum(v, false, t->heap[rk].index);
		values[2] = Float4GetDatum(t->heap[rk].score);
		values[3] = Int32GetDatum((int32) (rk + 1));
		put_row(fcinfo, values);
	}
}

PG_FUNCTION_INFO_V1(affinity_next_items_for_all);

/*
 * next_items_for_all(model, session_ids, item_ids, k, exclude, candidates,
 * positions) -> (session_id, item_id, score, rank): element i of the
 * arrays is one event (session, item [, position]); each session's events
 * are its elements in array order, or by position when given.  Events with
 * a NULL session or item are left out.  Sessions come out in key order
 * (text: byte order).
 */
Datum
affinity_next_items_for_all(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	ArrayType  *sa;
	NextRanking r;
	Datum	   *skeys;
	bool	   *snulls;
	int			ns;
	RecentEvent *ev;
	RecentEvent *group;
	bool		with_pos;
	int			ni;
	SessionEvent *se;
	int			m = 0;
	int			i;
	int			g;
	int64		k;
	bool		text_sessions;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1) || PG_ARGISNULL(2))
		return (Datum) 0;
	e = rules_model(fcinfo, "next_items_for_all");
	check_output_keys(fcinfo, &e->view, 1, false);
	k = get_k(fcinfo, 3, e->view.h->n_items);
	sa = PG_GETARG_ARRAYTYPE_P(1);
	text_sessions = ARR_ELEMTYPE(sa) == TEXTOID;
	if (ARR_NDIM(sa) > 1)
		ereport(ERROR,
				(errcode(ERRCODE_ARRAY_SUBSCRIPT_ERROR),
				 errmsg("the session ids must be a one-dimensional array"),
				 errdetail("The array has %d dimensions.", ARR_NDIM(sa))));
	if (text_sessions)
		deconstruct_array(sa, TEXTOID, -1, false, TYPALIGN_INT, &skeys, &snulls, &ns);
	else
		deconstruct_array(sa, INT8OID, 8, true, TYPALIGN_DOUBLE, &skeys, &snulls, &ns);
	ev = array_events(fcinfo, 2, 6, &e->view, &ni, &with_pos, "the item ids");
	if (ns != ni)
		ereport(ERROR,
				(errcode(ERRCODE_ARRAY_SUBSCRIPT_ERROR),
				 errmsg("the session ids and the item ids must have the same length"),
				 errdetail("There are %d session ids and %d item ids.", ns, ni),
				 errhint("Element i of both arrays is one event: aggregate both with the same ORDER BY.")));
	if (k == 0 || ns == 0)
		return (Datum) 0;
	se = palloc(sizeof(SessionEvent) * ns);
	for (i = 0; i < ns; i++)
		if (!snulls[i] && ev[i].idx != -2)
		{
			se[m].key = skeys[i];
			se[m++].at = i;
		}
	sort_text_keys = text_sessions;
	qsort(se, m, sizeof(SessionEvent), cmp_session_event);
	ranking_init(fcinfo, &r, e, k, 4, 5);
	group = palloc(sizeof(RecentEvent) * (m + 1));
	for (g = 0; g < m;)
	{
		int			end = g;
		int			n = 0;
		AffTopK		t;

		CHECK_FOR_INTERRUPTS();
		sort_text_keys = text_sessions;
		while (end < m && cmp_session_keys(se[g].key, se[end].key) == 0)
			group[n++] = ev[se[end++].at];
		rank_next(&r, group, n, with_pos, &t, "a session");
		emit_session(fcinfo, &e->view, se[g].key, &t);
		g = end;
	}
	return (Datum) 0;
}
