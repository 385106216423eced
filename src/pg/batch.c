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
 */
#include "serving_common.h"

#include "miscadmin.h"

#include "../core/serve.h"

/* users per chunk, and a bound on the kept entries of one chunk */
#define CHUNK_USERS 4096
#define CHUNK_ENTRIES (16 * 1024 * 1024)

/* Emit the rows of users[0..n) from the batch's output. */
static void
emit_chunk(FunctionCallInfo fcinfo, const AffModelView *v, const int32 *users,
		   int64 n, const AffBatch *b)
{
	int64		r;
	int64		j;

	AFF_ASSERT(n >= 0 && n <= b->chunk);
	for (r = 0; r < n; r++)
		for (j = 0; j < b->kept[r]; j++)
		{
			Datum		values[4];
			const AffScored *e = &b->out[r * b->k + j];

			values[0] = key_datum(v, true, users[r]);
			values[1] = key_datum(v, false, e->index);
			values[2] = Float4GetDatum(e->score);
			values[3] = Int32GetDatum((int32) (j + 1));
			put_row(fcinfo, values);
		}
}

PG_FUNCTION_INFO_V1(affinity_top_items_for_all);

/*
 * top_items_for_all(model, k, exclude_seen, users) ->
 *		(user_id, item_id, score, rank)
 */
Datum
affinity_top_items_for_all(PG_FUNCTION_ARGS)
{
	AffModelView v;
	AffServe	s;
	AffAllocator a = context_allocator(CurrentMemoryContext);
	AffBatch	b;
	AffError	err;
	AffStatus	st;
	int32	   *users;
	int			n_users;
	int64		k;
	int64		c;

	materialize(fcinfo);
	if (PG_ARGISNULL(0))
		return (Datum) 0;
	model_fetch(fcinfo, 0, &v);
	(void) model_method(&v);
	check_output_keys(fcinfo, &v, 0, true);
	check_output_keys(fcinfo, &v, 1, false);
	k = get_k(fcinfo, 1, v.h->n_items);
	require_arg(fcinfo, 2, "exclude_seen");
	if (k == 0)
		return (Datum) 0;
	if (PG_ARGISNULL(3))
	{
		n_users = (int) v.h->n_users;
		users = palloc_extended(sizeof(int32) * n_users, MCXT_ALLOC_HUGE);
		for (c = 0; c < n_users; c++)
			users[c] = (int32) c;
	}
	else
		users = array_key_indices(fcinfo, 3, &v, true, &n_users);

	memset(&s, 0, sizeof(s));
	s.v = &v;
	if (aff_batch_init(&b, &s, k, PG_GETARG_BOOL(2), resolve_threads(affinity_threads),
					   Max(1, Min(CHUNK_USERS, CHUNK_ENTRIES / k)), &a, &err) != AFF_OK)
		raise_engine_error(&err);
	for (c = 0; c < n_users; c += b.chunk)
	{
		int64		n = Min(b.chunk, n_users - c);

		CHECK_FOR_INTERRUPTS();
		st = aff_batch_run(&b, users + c, n, engine_poll, NULL, &err);
		if (st == AFF_ERR_NUMERIC)
			check_finite_scores(&v, false, b.bad_item,
								psprintf("user %s", key_cstring(&v, true, b.bad_user)));
		engine_check(st, &err);
		emit_chunk(fcinfo, &v, users + c, n, &b);
	}
	return (Datum) 0;
}
