/*
 * batch.c
 *		top_items_for_all: the nightly batch, top k for every user (or a
 *		list of users), block by block with matrix products.
 *
 * For implicit_als, users are processed in chunks; inside a chunk, worker
 * threads take blocks of users, compute the block's scores against all
 * items with one sgemm (X_block Y^T, single-threaded OpenBLAS per worker),
 * and keep each user's best k in a bounded heap, skipping training items
 * by walking the user's sorted training list.  Workers write only into
 * buffers prepared beforehand; the backend thread emits the rows of a
 * chunk, checks for interrupts, and moves on.  Other methods score user by
 * user on the backend thread through the same functions as top_items.
 */
#include "serving_common.h"

#include <cblas.h>
#include <math.h>

#include "miscadmin.h"
#include "utils/memutils.h"

#include "../core/parallel.h"
#include "weights.h"

/* users per chunk, and a bound on the kept entries of one chunk */
#define CHUNK_USERS 4096
#define CHUNK_ENTRIES (16 * 1024 * 1024)

typedef struct BatchJob
{
	const AffModelView *v;
	const int32 *users;			/* user indices of this chunk */
	int64		k;
	bool		exclude_seen;
	int			block;			/* users per sgemm */
	float	   *xbuf;			/* per thread: block * f */
	float	   *sbuf;			/* per thread: block * n_items */
	AffScored  *heaps;			/* per thread: k */
	int64		chunk;			/* users per chunk */
	AffScored  *out;			/* per chunk user: k */
	int64	   *kept;			/* per chunk user */
} BatchJob;

/* The best k unseen items of one user from its score row. */
static void
select_row(const BatchJob *job, int32 u, const float *row, AffScored *heap,
		   AffScored *out, int64 *kept)
{
	const AffModelView *v = job->v;
	const int32 *seen = v->seen_items + v->seen_ptr[u];
	const int32 *seen_end = v->seen_items + v->seen_ptr[u + 1];
	AffTopK		t;
	int32		i;

	aff_topk_init(&t, heap, job->k);
	for (i = 0; i < (int32) v->h->n_items; i++)
	{
		if (job->exclude_seen && seen < seen_end && *seen == i)
		{
			seen++;
			continue;
		}

		/*
		 * Once the heap is full, a score not above its worst cannot enter
		 * (indices rise, so an equal score loses the tie): skip the call.
		 */
		if (t.n == t.k && !(row[i] > t.heap[0].score))
			continue;
		aff_topk_push(&t, row[i], i);
	}
	*kept = aff_topk_finish(&t);
	memcpy(out, heap, sizeof(AffScored) * *kept);
}

static void
batch_block(void *arg, int thread_no, int64 block_no, int64 begin, int64 end)
{
	BatchJob   *job = arg;
	const AffModelView *v = job->v;
	int			f = v->h->factors;
	int64		m = v->h->n_items;
	float	   *x = job->xbuf + (size_t) thread_no * job->block * f;
	float	   *s = job->sbuf + (size_t) thread_no * job->block * m;
	AffScored  *heap = job->heaps + (size_t) thread_no * job->k;
	int64		r;

	(void) block_no;
	for (r = begin; r < end; r++)
		memcpy(x + (size_t) (r - begin) * f,
			   v->user_factors + (size_t) job->users[r] * f, sizeof(float) * f);
	cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int) (end - begin), (int) m, f,
				1.0f, x, f, v->item_factors, f, 0.0f, s, (int) m);
	for (r = begin; r < end; r++)
		select_row(job, job->users[r], s + (size_t) (r - begin) * m, heap,
				   job->out + (size_t) r * job->k, &job->kept[r]);
}

/* Emit the rows of users[0..n) from out/kept. */
static void
emit_chunk(FunctionCallInfo fcinfo, const AffModelView *v, const int32 *users,
		   int64 n, int64 k, const AffScored *out, const int64 *kept)
{
	int64		r;
	int64		j;

	for (r = 0; r < n; r++)
		for (j = 0; j < kept[r]; j++)
		{
			Datum		values[4];
			const AffScored *e = &out[r * k + j];

			values[0] = key_datum(v, true, users[r]);
			values[1] = key_datum(v, false, e->index);
			values[2] = Float4GetDatum(e->score);
			values[3] = Int32GetDatum((int32) (j + 1));
			put_row(fcinfo, values);
		}
}

/* Per-user scoring on the backend thread, for methods without factors. */
static void
score_user_serial(const AffModelView *v, int32 u, float *row)
{
	int64		lo = v->seen_ptr[u];

	if (v->h->method == AFF_METHOD_POPULARITY)
		memcpy(row, v->popularity, sizeof(float) * v->h->n_items);
	else
		weights_scores(v, v->seen_items + lo, v->seen_weights + lo,
					   v->seen_ptr[u + 1] - lo, row);
}

/* Buffers of one job; sizes were guarded by the caller. */
static void
batch_alloc(BatchJob *job, int threads)
{
	const AffModelView *v = job->v;
	int64		m = v->h->n_items;

	job->xbuf = palloc_extended(sizeof(float) * job->block * Max(v->h->factors, 1) * threads,
								MCXT_ALLOC_HUGE);
	job->sbuf = palloc_extended(sizeof(float) * job->block * m * threads, MCXT_ALLOC_HUGE);
	job->heaps = palloc_extended(sizeof(AffScored) * job->k * threads, MCXT_ALLOC_HUGE);
	job->out = palloc_extended(sizeof(AffScored) * job->k * job->chunk, MCXT_ALLOC_HUGE);
	job->kept = palloc(sizeof(int64) * job->chunk);
}

PG_FUNCTION_INFO_V1(top_items_for_all);

/*
 * top_items_for_all(model, k, exclude_seen, users) ->
 *		(user_id, item_id, score, rank)
 */
Datum
top_items_for_all(PG_FUNCTION_ARGS)
{
	AffModelView v;
	BatchJob	job;
	int32	   *users;
	int			n_users;
	int			threads;
	int64		c;

	materialize(fcinfo);
	if (PG_ARGISNULL(0))
		return (Datum) 0;
	model_fetch(fcinfo, 0, &v);
	check_output_keys(fcinfo, &v, 0);
	job.v = &v;
	job.k = get_k(fcinfo, 1, v.h->n_items);
	require_arg(fcinfo, 2, "exclude_seen");
	job.exclude_seen = PG_GETARG_BOOL(2);
	if (job.k == 0)
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

	/* about 8M floats of scores per thread at most */
	job.block = (int) Max(1, Min(64, (8 * 1024 * 1024) / v.h->n_items));
	threads = v.h->method == AFF_METHOD_IMPLICIT_ALS ? resolve_threads(affinity_threads) : 1;
	job.chunk = Max(1, Min(CHUNK_USERS, CHUNK_ENTRIES / job.k));
	batch_alloc(&job, threads);

	for (c = 0; c < n_users; c += job.chunk)
	{
		int64		n = Min(job.chunk, n_users - c);
		AffError	err;

		CHECK_FOR_INTERRUPTS();
		job.users = users + c;
		if (v.h->method == AFF_METHOD_IMPLICIT_ALS)
		{
			engine_check(aff_parallel_for(threads, n, job.block, batch_block, &job,
										  engine_poll, NULL, &err), &err);
		}
		else
		{
			int64		r;

			for (r = 0; r < n; r++)
			{
				CHECK_FOR_INTERRUPTS();
				score_user_serial(&v, job.users[r], job.sbuf);
				select_row(&job, job.users[r], job.sbuf, job.heaps,
						   job.out + r * job.k, &job.kept[r]);
			}
		}
		emit_chunk(fcinfo, &v, job.users, n, job.k, job.out, job.kept);
	}
	return (Datum) 0;
}
