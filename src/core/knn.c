/*
 * knn.c
 *		Item-item cosine neighbours by sparse products.
 *
 * For item i, the dot products with every item j that shares a user are
 * accumulated by walking i's users (CSR by item) and each user's items (CSR
 * by user) into a dense per-thread accumulator of n_items doubles with a
 * list of the entries touched, so only co-occurring pairs are visited and
 * no items x items matrix ever exists.  The cost is
 *		sum over users u of |items of u|^2
 * multiply-adds in total, plus O(t log k) heap work for the t items that
 * co-occur with i.  The touched entries are divided by the two column
 * norms, offered to a bounded heap of the k best (core/topk.c, ties to the
 * smaller index), and cleared again.
 *
 * Items are spread over the worker threads in small blocks (popular items
 * cost far more than rare ones).  Each item's list depends only on the
 * input, so the result is the same for any thread count.  Lists are written
 * to fixed slots of k entries per item and compacted into CSR at the end,
 * in place.
 */
#include "knn.h"
#include "als.h"
#include "parallel.h"
#include "topk.h"

#include <math.h>
#include <string.h>

#define ITEMS_PER_BLOCK 4

typedef struct KnnJob
{
	const AffMatrix *m;
	int64_t		k;				/* kept per item */
	const float *col_conf;		/* [nnz] c_ui in column order */
	const float *row_conf;		/* [nnz] c_ui in row order */
	const double *norm;			/* [n_items] column norms */
	double	   *acc;			/* [threads * n_items] zero between items */
	int32_t    *touched;		/* [threads * n_items] */
	AffScored  *heaps;			/* [threads * k] */
	int32_t    *idx;			/* [n_items * k] slots */
	float	   *sim;			/* [n_items * k] slots */
	int64_t    *ptr;			/* [n_items + 1]; ptr[i + 1] = kept for item i */
} KnnJob;

/* a * b + c into *out, 0 on overflow of size_t */
static int
mul_add(size_t a, size_t b, size_t c, size_t *out)
{
	size_t		p;

	if (aff_mul_overflows(a, b, &p) || p > SIZE_MAX - c)
		return 0;
	*out = p + c;
	return 1;
}

static int64_t
kept_per_item(const AffMatrix *m, const AffKnnParams *p)
{
	int64_t		others = m->n_items - 1;

	return p->neighbors < others ? p->neighbors : others;
}

/*
 * Peak bytes of aff_item_knn's work arrays and result (0 when the count
 * overflows size_t): confidences both ways, norms, per-thread accumulators
 * and heaps, and k slots per item.
 */
size_t
aff_item_knn_work_bytes(const AffMatrix *m, const AffKnnParams *p)
{
	size_t		n = (size_t) m->n_items;
	size_t		k = (size_t) kept_per_item(m, p);
	size_t		t = (size_t) p->threads;
	size_t		bytes = 0;

	if (!mul_add((size_t) m->nnz, 2 * sizeof(float), bytes, &bytes) ||
		!mul_add(n + 1, sizeof(double) + sizeof(int64_t), bytes, &bytes) ||
		!mul_add(t, n * (sizeof(double) + sizeof(int32_t)), bytes, &bytes) ||
		!mul_add(t, k * sizeof(AffScored), bytes, &bytes) ||
		!mul_add(n, k * (sizeof(int32_t) + sizeof(float)), bytes, &bytes))
		return 0;
	return bytes;
}

/* The neighbour list of each item in [begin, end), into its slots. */
static void
knn_items(void *arg, int thread_no, int64_t block_no, int64_t begin,
		  int64_t end)
{
	KnnJob	   *job = arg;
	const AffMatrix *m = job->m;
	double	   *acc = job->acc + (size_t) thread_no * m->n_items;
	int32_t    *touched = job->touched + (size_t) thread_no * m->n_items;
	AffScored  *heap = job->heaps + (size_t) thread_no * job->k;
	int64_t		i;

	(void) block_no;
	for (i = begin; i < end; i++)
	{
		int64_t		nt = 0;
		int64_t		c;
		int64_t		t;
		int64_t		kept;
		AffTopK		top;

		for (c = m->col_ptr[i]; c < m->col_ptr[i + 1]; c++)
		{
			int32_t		u = m->col_idx[c];
			double		ci = job->col_conf[c];
			int64_t		r;

			for (r = m->row_ptr[u]; r < m->row_ptr[u + 1]; r++)
			{
				int32_t		j = m->row_idx[r];

				if (j == i)
					continue;
				/* confidences are >= 1, so a touched entry is never 0 */
				if (acc[j] == 0.0)
					touched[nt++] = j;
				acc[j] += ci * job->row_conf[r];
			}
		}
		aff_topk_init(&top, heap, job->k);
		for (t = 0; t < nt; t++)
		{
			int32_t		j = touched[t];
			double		s = acc[j] / (job->norm[i] * job->norm[j]);

			acc[j] = 0.0;
			if (s > 0.0)
				aff_topk_push(&top, (float) s, j);
		}
		kept = aff_topk_finish(&top);
		for (t = 0; t < kept; t++)
		{
			job->idx[(size_t) i * job->k + t] = heap[t].index;
			job->sim[(size_t) i * job->k + t] = heap[t].score;
		}
		job->ptr[i + 1] = kept;
	}
}

/* Confidences both ways and the column norms. */
static void
knn_prepare(const AffMatrix *m, const AffKnnParams *p, KnnJob *job,
			float *col_conf, float *row_conf, double *norm)
{
	int64_t		i;
	int64_t		c;

	for (c = 0; c < m->nnz; c++)
	{
		row_conf[c] = (float) aff_confidence(p->confidence, p->alpha, p->epsilon, m->row_val[c]);
		col_conf[c] = (float) aff_confidence(p->confidence, p->alpha, p->epsilon, m->col_val[c]);
	}
	for (i = 0; i < m->n_items; i++)
	{
		double		s = 0.0;

		for (c = m->col_ptr[i]; c < m->col_ptr[i + 1]; c++)
			s += (double) col_conf[c] * col_conf[c];
		norm[i] = sqrt(s);
	}
	job->m = m;
	job->k = kept_per_item(m, p);
	job->col_conf = col_conf;
	job->row_conf = row_conf;
	job->norm = norm;
}

/* Slots -> CSR: prefix sums of the counts, lists moved left in place. */
static void
knn_compact(KnnJob *job, int64_t n)
{
	int64_t		i;

	job->ptr[0] = 0;
	for (i = 0; i < n; i++)
	{
		int64_t		cnt = job->ptr[i + 1];
		int64_t		to = job->ptr[i];

		if (cnt > 0 && to != i * job->k)
		{
			memmove(job->idx + to, job->idx + (size_t) i * job->k, sizeof(int32_t) * cnt);
			memmove(job->sim + to, job->sim + (size_t) i * job->k, sizeof(float) * cnt);
		}
		job->ptr[i + 1] = to + cnt;
	}
}

/*
 * Fit the neighbour lists of m into *out (allocated through a; free with
 * aff_neighbors_free).  Scratch is released before returning, on every
 * path.  Returns AFF_ERR_CANCELLED when poll asked to stop.
 */
AffStatus
aff_item_knn(const AffMatrix *m, const AffKnnParams *p, const AffAllocator *a,
			 AffNeighbors *out, AffPollFn poll, void *poll_arg, AffError *err)
{
	size_t		n = (size_t) m->n_items;
	size_t		t = (size_t) (p->threads < 1 ? 1 : p->threads);
	KnnJob		job;
	float	   *col_conf;
	float	   *row_conf;
	double	   *norm;
	AffStatus	st = AFF_OK;

	memset(out, 0, sizeof(*out));
	memset(&job, 0, sizeof(job));
	if (aff_item_knn_work_bytes(m, p) == 0)
		return aff_fail(err, AFF_ERR_LIMIT, "item_knn work arrays are too large");
	col_conf = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	row_conf = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	norm = aff_alloc_array(a, n, sizeof(double));
	job.k = kept_per_item(m, p);
	job.acc = aff_alloc_array(a, t * n, sizeof(double));
	job.touched = aff_alloc_array(a, t * n, sizeof(int32_t));
	job.heaps = aff_alloc_array(a, t * (size_t) job.k, sizeof(AffScored));
	out->ptr = aff_alloc_array(a, n + 1, sizeof(int64_t));
	out->idx = aff_alloc_array(a, n * (size_t) job.k, sizeof(int32_t));
	out->sim = aff_alloc_array(a, n * (size_t) job.k, sizeof(float));
	if (!col_conf || !row_conf || !norm || !job.acc || !job.touched ||
		!job.heaps || !out->ptr || !out->idx || !out->sim)
		st = aff_fail(err, AFF_ERR_NOMEM, "out of memory for the item_knn work arrays");
	else
	{
		knn_prepare(m, p, &job, col_conf, row_conf, norm);
		memset(job.acc, 0, sizeof(double) * t * n);
		job.idx = out->idx;
		job.sim = out->sim;
		job.ptr = out->ptr;
		st = aff_parallel_for((int) t, m->n_items, ITEMS_PER_BLOCK, knn_items,
							  &job, poll, poll_arg, err);
	}
	aff_release(a, col_conf);
	aff_release(a, row_conf);
	aff_release(a, norm);
	aff_release(a, job.acc);
	aff_release(a, job.touched);
	aff_release(a, job.heaps);
	if (st != AFF_OK)
	{
		aff_neighbors_free(a, out);
		return st;
	}
	knn_compact(&job, m->n_items);
	out->count = out->ptr[m->n_items];
	return AFF_OK;
}

void
aff_neighbors_free(const AffAllocator *a, AffNeighbors *nb)
{
	aff_release(a, nb->ptr);
	aff_release(a, nb->idx);
	aff_release(a, nb->sim);
	memset(nb, 0, sizeof(*nb));
}
