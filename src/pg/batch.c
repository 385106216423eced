/*
 * batch.c
 *		top_items_for_all: the nightly batch, top k for every user (or a
 *		list of users).
 *
 * The work is the engine's batch kernel (core/serve.c): users in chunks,
 * each chunk split in blocks over worker threads, a block scored at once
 * by the model's method (one sgemm for implicit_als, user by user for the
 * others) and each row's best k kept in a bounded heap.  Workers run only
 * engine code on buffers the engine allocated beforehand; this file parses
 * the arguments, emits each chunk's rows and checks for interrupts between
 * chunks on the backend thread.
 *
 * Users of the list that the model does not know get the model's popular
 * items, as top_items gives them (unless fallback_popular is false), after
 * the known users' rows; the result's source column says which rows are
 * which.
 */
#include "serving_common.h"

#include "miscadmin.h"
#include "catalog/pg_type.h"
#include "utils/array.h"
#include "utils/builtins.h"

#include "../core/serve.h"

/* users per chunk, and a bound on the kept entries of one chunk */
#define CHUNK_USERS 4096
#define CHUNK_ENTRIES (16 * 1024 * 1024)

/*
 * Where the arguments are.  1.3 declares (model, k, exclude_seen, users,
 * exclude, candidates, fallback_popular) and, for text keys by name,
 * (model, users, k, exclude_seen, exclude, candidates, fallback_popular),
 * both with rules last;
 * a database not yet updated from 1.2 declares (model, k, exclude_seen,
 * users) and is served as it was: no filters, unknown users left out.
 * -1: the argument is absent.
 */
typedef struct BatchArgs
{
	int			k;
	int			exclude_seen;
	int			users;
	int			exclude;
	int			candidates;
	int			fallback;
	int			rules;
} BatchArgs;

static const BatchArgs batch_args_1_3 = {1, 2, 3, 4, 5, 6, 7};
static const BatchArgs batch_args_named = {2, 3, 1, 4, 5, 6, 7};
static const BatchArgs batch_args_1_2 = {1, 2, 3, -1, -1, -1, -1};

/*
 * The rules of the call (rules.c), when it has any: the batch keeps each
 * user's best pool items, and the backend re-ranks them chunk by chunk.
 */
typedef struct BatchRules
{
	AffRules	r;
	AffServe	s;
	RulesScratch *scratch;
	AffScored  *out;			/* k */
	int64		k;
} BatchRules;

/* Put one result row: (user, item, score, rank, source). */
static void
put_batch_row(FunctionCallInfo fcinfo, Datum user, Datum item, float score, int64 rank,
			  Datum source)
{
	Datum		values[5];

	values[0] = user;
	values[1] = item;
	values[2] = Float4GetDatum(score);
	values[3] = Int32GetDatum((int32) rank);
	values[4] = source;
	put_row(fcinfo, values);
}

/*
 * Emit the rows of users[0..n) from the batch's output, through the rules
 * when br is not NULL (the output then holds each user's pool).
 */
static void
emit_chunk(FunctionCallInfo fcinfo, const AffModelView *v, const int32 *users,
		   int64 n, const AffBatch *b, Datum source, BatchRules *br)
{
	int64		r;
	int64		j;

	AFF_ASSERT(n >= 0 && n <= b->chunk);
	for (r = 0; r < n; r++)
	{
		const AffScored *list = &b->out[r * b->k];
		int64		kept = b->kept[r];

		if (br != NULL)
		{
			kept = rules_rank(&br->s, &br->r, br->scratch, list, kept, br->k, br->out);
			list = br->out;
		}
		for (j = 0; j < kept; j++)
			put_batch_row(fcinfo, key_datum(v, true, users[r]), key_datum(v, false, list[j].index),
						  list[j].score, j + 1, source);
	}
}

/* Order of bigint keys, and of text keys by length and bytes. */
static int
cmp_int64_datum(const void *a, const void *b)
{
	int64		x = DatumGetInt64(*(const Datum *) a);
	int64		y = DatumGetInt64(*(const Datum *) b);

	return x < y ? -1 : (x > y);
}

static int
cmp_text_datum(const void *a, const void *b)
{
	text	   *x = DatumGetTextPP(*(const Datum *) a);
	text	   *y = DatumGetTextPP(*(const Datum *) b);
	int			lx = VARSIZE_ANY_EXHDR(x);
	int			ly = VARSIZE_ANY_EXHDR(y);

	if (lx != ly)
		return lx < ly ? -1 : 1;
	return memcmp(VARDATA_ANY(x), VARDATA_ANY(y), lx);
}

/*
 * The keys of the users list (argument argno) that the model does not
 * know, sorted and without repeats (a sort, so a long list of repeats
 * costs n log n); *n gets their count.
 */
static Datum *
unknown_users(FunctionCallInfo fcinfo, int argno, const AffModelView *v, int *n)
{
	ArrayType  *arr = PG_GETARG_ARRAYTYPE_P(argno);
	bool		text_call = ARR_ELEMTYPE(arr) == TEXTOID;
	Datum	   *elems;
	bool	   *nulls;
	int			ne;
	int			out = 0;
	int			i;

	if (text_call)
		deconstruct_array(arr, TEXTOID, -1, false, TYPALIGN_INT, &elems, &nulls, &ne);
	else
		deconstruct_array(arr, INT8OID, 8, true, TYPALIGN_DOUBLE, &elems, &nulls, &ne);
	for (i = 0; i < ne; i++)
		if (!nulls[i] && key_elem_index(v, true, elems[i], text_call) < 0)
			elems[out++] = elems[i];
	qsort(elems, out, sizeof(Datum), text_call ? cmp_text_datum : cmp_int64_datum);
	*n = 0;
	for (i = 0; i < out; i++)
		if (i == 0 || (text_call ? cmp_text_datum : cmp_int64_datum) (&elems[i], &elems[i - 1]) != 0)
			elems[(*n)++] = elems[i];
	return elems;
}

/*
 * The popular items (through the batch's exclude mask and candidates) for
 * each of the n unknown users, as top_items gives an unknown user.
 */
static void
emit_unknown(FunctionCallInfo fcinfo, const AffModelView *v, const AffBatch *b,
			 const Datum *unknown, int n, BatchRules *br)
{
	AffItemFilter flt;
	AffTopK		t;
	int64		kept;
	int64		bad;
	Datum		source = CStringGetTextDatum(affinity_source_popular);
	const AffScored *list;
	int			u;
	int64		r;

	if (n == 0)
		return;
	memset(&flt, 0, sizeof(flt));
	flt.skip = b->exclude;
	flt.cand = b->cand;
	flt.n_cand = b->n_cand;
	aff_topk_init(&t, palloc(sizeof(AffScored) * Max(b->k, 1)), b->k);
	bad = aff_topk_scores(v->popularity, v->h->n_items, &flt, &t);
	check_finite_scores(v, false, bad, "an unknown user");
	kept = aff_topk_finish(&t);
	list = t.heap;
	if (br != NULL)
	{
		kept = rules_rank(&br->s, &br->r, br->scratch, t.heap, kept, br->k, br->out);
		list = br->out;
	}
	for (u = 0; u < n; u++)
	{
		CHECK_FOR_INTERRUPTS();
		for (r = 0; r < kept; r++)
			put_batch_row(fcinfo, unknown[u], key_datum(v, false, list[r].index),
						  list[r].score, r + 1, source);
	}
}

/* The item mask of argument argno (exclude), or NULL when it is NULL. */
static uint8 *
exclude_mask(FunctionCallInfo fcinfo, int argno, const AffModelView *v)
{
	uint8	   *skip;
	int32	   *idx;
	int			n;
	int			i;

	if (argno < 0 || PG_ARGISNULL(argno))
		return NULL;
	idx = array_key_indices(fcinfo, argno, v, false, &n);
	skip = palloc_extended(v->h->n_items, MCXT_ALLOC_HUGE | MCXT_ALLOC_ZERO);
	for (i = 0; i < n; i++)
		skip[idx[i]] = 1;
	return skip;
}

/* The batch over the arguments where ba says they are. */
static Datum
top_items_for_all(FunctionCallInfo fcinfo, const BatchArgs *ba)
{
	CachedModel *cm;
	AffModelView v;
	BatchRules	brs;
	BatchRules *br = NULL;
	AffAllocator ra;
	AffServe	s;
	AffAllocator a = context_allocator(CurrentMemoryContext);
	AffBatch	b;
	AffError	err;
	AffStatus	st;
	int32	   *users;
	int			n_users;
	Datum	   *unknown = NULL;
	int			n_unknown = 0;
	bool		fallback;
	Datum		source;
	int64		k;
	int64		c;

	materialize(fcinfo);
	if (PG_ARGISNULL(0))
		return (Datum) 0;
	cm = model_get(fcinfo, 0);
	v = cm->view;
	check_output_keys(fcinfo, &v, 0, true);
	check_output_keys(fcinfo, &v, 1, false);
	k = get_k(fcinfo, ba->k, v.h->n_items);
	require_arg(fcinfo, ba->exclude_seen, "exclude_seen");
	if (ba->fallback >= 0)
		require_arg(fcinfo, ba->fallback, "fallback_popular");
	fallback = ba->fallback >= 0 && PG_GETARG_BOOL(ba->fallback);
	source = CStringGetTextDatum(model_method(&v)->personal ? affinity_source_personal
								 : affinity_source_popular);
	if (k == 0)
		return (Datum) 0;
	if (ba->rules >= 0 && rules_parse(fcinfo, ba->rules, &v, k, &brs.r))
	{
		br = &brs;
		br->k = k;
		serve_context(cm, &br->s, &ra, SERVE_ITEM_NORMS);
		br->scratch = rules_scratch(&v, &br->r);
		br->out = palloc(sizeof(AffScored) * k);
	}
	if (PG_ARGISNULL(ba->users))
	{
		n_users = (int) v.h->n_users;
		users = palloc_extended(sizeof(int32) * n_users, MCXT_ALLOC_HUGE);
		for (c = 0; c < n_users; c++)
			users[c] = (int32) c;
	}
	else
	{
		users = array_key_indices(fcinfo, ba->users, &v, true, &n_users);
		if (fallback)
			unknown = unknown_users(fcinfo, ba->users, &v, &n_unknown);
	}

	memset(&s, 0, sizeof(s));
	s.v = &v;
	if (br != NULL)
		k = br->r.pool;			/* each user's pool, re-ranked chunk by chunk */
	if (aff_batch_init(&b, &s, k, PG_GETARG_BOOL(ba->exclude_seen),
					   resolve_threads(affinity_threads),
					   Max(1, Min(CHUNK_USERS, CHUNK_ENTRIES / k)), &a, &err) != AFF_OK)
		raise_engine_error(&err);
	b.exclude = exclude_mask(fcinfo, ba->exclude, &v);
	if (ba->candidates >= 0 && !PG_ARGISNULL(ba->candidates))
	{
		int			nc;

		b.cand = array_key_indices(fcinfo, ba->candidates, &v, false, &nc);
		b.n_cand = nc;
	}
	for (c = 0; c < n_users; c += b.chunk)
	{
		int64		n = Min(b.chunk, n_users - c);

		CHECK_FOR_INTERRUPTS();
		st = aff_batch_run(&b, users + c, n, engine_poll, NULL, &err);
		if (st == AFF_ERR_NUMERIC)
			check_finite_scores(&v, false, b.bad_item,
								psprintf("user %s", key_cstring(&v, true, b.bad_user)));
		engine_check(st, &err);
		emit_chunk(fcinfo, &v, users + c, n, &b, source, br);
	}
	emit_unknown(fcinfo, &v, &b, unknown, n_unknown, br);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(affinity_top_items_for_all);

/*
 * top_items_for_all(model, k, exclude_seen, users, exclude, candidates,
 *					 fallback_popular) -> (user_id, item_id, score, rank, source)
 */
Datum
affinity_top_items_for_all(PG_FUNCTION_ARGS)
{
	return top_items_for_all(fcinfo, PG_NARGS() == 4 ? &batch_args_1_2 : &batch_args_1_3);
}

PG_FUNCTION_INFO_V1(affinity_top_items_for_all_named);

/*
 * top_items_for_all(model, users text[], k, exclude_seen, exclude,
 *					 candidates, fallback_popular): the text form by name
 */
Datum
affinity_top_items_for_all_named(PG_FUNCTION_ARGS)
{
	return top_items_for_all(fcinfo, &batch_args_named);
}
