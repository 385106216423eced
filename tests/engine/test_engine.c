/*
 * test_engine.c
 *		The engine outside the server: each method's real fit and serving
 *		kernels on small inputs, checked against values computed another
 *		way (dense naive sums, an exact normal-equation solve, brute-force
 *		top-k and cosine), at sizes that cross several blocks and threads.
 *
 * Built with -DAFF_ASSERTS and AddressSanitizer/UBSan by
 * tests/check_engine.sh.  Prints one line per check; exits 1 on a failure.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "aff_core.h"
#include "interactions.h"
#include "method.h"
#include "model_format.h"
#include "serve.h"
#include "als.h"
#include "sequences.h"

static int	failures = 0;

static void
check(int ok, const char *what, double got, double want)
{
	printf("%-4s %s (got %.6g, want %.6g)\n", ok ? "ok" : "FAIL", what, got, want);
	if (!ok)
		failures++;
}

/* An allocator that keeps every block and frees them all at the end. */
typedef struct Arena
{
	void	  **blocks;
	size_t		n;
	size_t		cap;
} Arena;

static void *
arena_alloc(void *ctx, size_t size)
{
	Arena	   *a = ctx;
	void	   *p = malloc(size);

	if (p == NULL)
		return NULL;
	if (a->n == a->cap)
	{
		a->cap = a->cap ? a->cap * 2 : 64;
		a->blocks = realloc(a->blocks, a->cap * sizeof(void *));
	}
	a->blocks[a->n++] = p;
	return p;
}

static void
arena_release(void *ctx, void *ptr)
{
	Arena	   *a = ctx;
	size_t		i;

	for (i = 0; i < a->n; i++)
		if (a->blocks[i] == ptr)
		{
			free(ptr);
			a->blocks[i] = a->blocks[--a->n];
			return;
		}
}

static void
arena_free(Arena *a)
{
	size_t		i;

	for (i = 0; i < a->n; i++)
		free(a->blocks[i]);
	free(a->blocks);
	memset(a, 0, sizeof(*a));
}

static int
no_poll(void *arg)
{
	(void) arg;
	return 0;
}

/* Deterministic pseudo-random numbers (splitmix64). */
static uint64_t rng = 12345;

static uint64_t
next_u64(void)
{
	uint64_t	z = (rng += 0x9e3779b97f4a7c15ULL);

	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
	z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
	return z ^ (z >> 31);
}


/* Build the matrix of rows with the defaults of a fit (no minimums, a fixed index key). */
static AffStatus
build(AffTriple *rows, int64_t n, const AffAllocator *a, AffMatrix *m, AffError *err)
{
	AffBuildParams bp;

	memset(&bp, 0, sizeof(bp));
	bp.min_user = 1;
	bp.min_item = 1;
	bp.index_key[0] = 0x0123456789abcdefULL;
	bp.index_key[1] = 0xfedcba9876543210ULL;
	return aff_matrix_build(rows, n, &bp, a, m, err);
}

/* A model fitted by method `method` on users x items random rows, as bytes. */
static uint8_t *
fit_model(Arena *ar, const AffAllocator *a, int method, int64_t users, int64_t items,
		  int threads, AffModelView *v)
{
	int64_t		n = users * 8;
	AffTriple  *rows = malloc(sizeof(AffTriple) * n);
	AffMatrix	m;
	AffOptions	o;
	AffModelParts parts;
	AffFitContext cx;
	AffError	err;
	uint64_t	size;
	uint8_t    *buf;
	float	   *pop;
	int64_t		i;

	(void) ar;
	for (i = 0; i < n; i++)
	{
		rows[i].user = (int64_t) (i / 8) * 3 + 1;
		rows[i].item = (int64_t) (next_u64() % (uint64_t) items) * 7 + 2;
		rows[i].weight = (float) (1 + next_u64() % 4);
		rows[i].pad = 0;
	}
	if (build(rows, n, a, &m, &err) != AFF_OK)
	{
		printf("FAIL matrix build: %s\n", err.msg);
		exit(1);
	}
	free(rows);
	memset(&o, 0, sizeof(o));
	o.method = method;
	o.factors = 12;
	o.iterations = 3;
	o.solver = AFF_SOLVER_CG;
	o.solver_steps = 3;
	o.confidence = AFF_CONFIDENCE_LOG;
	o.threads = threads;
	o.min_user_interactions = o.min_item_interactions = 1;
	o.neighbors = 15;
	o.max_items = 20000;
	o.regularization = method == AFF_METHOD_EASE ? 50 : 0.5;
	o.alpha = 5;
	o.epsilon = 1;
	o.seed = 7;
	aff_fit_header(&parts, &o, &m, AFF_KEYS_BIGINT);
	pop = aff_alloc_array(a, (size_t) m.n_items, sizeof(float));
	for (i = 0; i < m.n_items; i++)
		pop[i] = (float) (m.col_ptr[i + 1] - m.col_ptr[i]);
	parts.data[AFF_SEC_POPULARITY] = pop;
	parts.count[AFF_SEC_POPULARITY] = (uint64_t) m.n_items;
	memset(&cx, 0, sizeof(cx));
	cx.alloc = a;
	cx.poll = no_poll;
	cx.max_model_bytes = (uint64_t) 1 << 30;
	if (aff_fit_run(&m, &o, &cx, &parts, &err) != AFF_OK ||
		aff_model_size(&parts, &size, &err) != AFF_OK)
	{
		printf("FAIL fit of method %d: %s %s\n", method, err.msg, err.detail);
		exit(1);
	}
	buf = aff_alloc(a, size);
	aff_model_write(&parts, buf, size);
	if (aff_model_validate(buf, size, v, &err) != AFF_OK)
	{
		printf("FAIL fitted model does not validate: %s %s\n", err.msg, err.detail);
		exit(1);
	}
	return buf;
}

/* Naive score of (u, i): dot product or sum of pair weights, in double. */
static double
naive_pair(const AffModelView *v, int64_t u, int64_t i)
{
	double		s = 0;
	int64_t		j;
	int64_t		k;
	int			f;

	if (v->h->method == AFF_METHOD_IMPLICIT_ALS)
	{
		for (f = 0; f < v->h->factors; f++)
			s += (double) v->user_factors[u * v->h->factors + f] *
				v->item_factors[i * v->h->factors + f];
		return s;
	}
	if (v->h->method == AFF_METHOD_POPULARITY)
		return v->popularity[i];
	for (j = v->seen_ptr[u]; j < v->seen_ptr[u + 1]; j++)
	{
		int32_t		t = v->seen_items[j];

		if (v->h->method == AFF_METHOD_EASE)
			s += v->item_weights[(size_t) t * v->h->n_items + i];
		else
			for (k = v->neighbor_ptr[t]; k < v->neighbor_ptr[t + 1]; k++)
				if (v->neighbor_idx[k] == i)
					s += v->neighbor_sim[k];
	}
	return s;
}

/*
 * Largest |basket score - exact| / max(1, max |exact|) accepted: measured
 * 6.0e-8 log, 8.9e-8 linear (implicit_als, float factors and float scores against double
 * sums); 100x that.  Against the user's stored vector instead (CG against
 * the previous sweep's item factors) the difference is 1.6e-1, and a wrong
 * alpha, epsilon or confidence function moves scores by 1e-2 and more.
 */
#define FOLD_IN_TOL 6e-6

/*
 * scores = Y x for the fold-in of a basket, x solving
 * (sum_i c_i y_i y_i^T + lambda I) x = sum_j c_j y_j (c_i = 1 off the
 * basket, preference 1 on it), the system formed over every item in
 * double and solved by Gaussian elimination with partial pivoting.
 */
static void
exact_fold_in(const AffModelView *v, const int32_t *idx, const float *w, int64_t n,
			  float *scores)
{
	int			f = v->h->factors;
	int64_t		m = v->h->n_items;
	double	   *A = calloc((size_t) f * (f + 1), sizeof(double));
	double	   *c = malloc(sizeof(double) * (size_t) m);
	double		x[AFF_MAX_FACTORS];
	int64_t		i;
	int			p;
	int			q;
	int			r;

	for (i = 0; i < m; i++)
		c[i] = 1;
	for (i = 0; i < n; i++)
		c[idx[i]] = v->h->confidence == AFF_CONFIDENCE_LINEAR ?
			1 + v->h->alpha * w[i] : 1 + v->h->alpha * log(1 + w[i] / v->h->epsilon);
	/* augmented matrix [A | b], row p at A + p * (f + 1) */
	for (i = 0; i < m; i++)
	{
		const float *y = v->item_factors + (size_t) i * f;

		for (p = 0; p < f; p++)
			for (q = 0; q < f; q++)
				A[p * (f + 1) + q] += c[i] * y[p] * y[q];
	}
	for (i = 0; i < n; i++)
		for (p = 0; p < f; p++)
			A[p * (f + 1) + f] += c[idx[i]] * v->item_factors[(size_t) idx[i] * f + p];
	for (p = 0; p < f; p++)
		A[p * (f + 1) + p] += v->h->regularization;
	for (p = 0; p < f; p++)
	{
		int			best = p;

		for (r = p + 1; r < f; r++)
			if (fabs(A[r * (f + 1) + p]) > fabs(A[best * (f + 1) + p]))
				best = r;
		for (q = 0; q <= f; q++)
		{
			double		t = A[p * (f + 1) + q];

			A[p * (f + 1) + q] = A[best * (f + 1) + q];
			A[best * (f + 1) + q] = t;
		}
		for (r = p + 1; r < f; r++)
		{
			double		g = A[r * (f + 1) + p] / A[p * (f + 1) + p];

			for (q = p; q <= f; q++)
				A[r * (f + 1) + q] -= g * A[p * (f + 1) + q];
		}
	}
	for (p = f - 1; p >= 0; p--)
	{
		double		t = A[p * (f + 1) + f];

		for (q = p + 1; q < f; q++)
			t -= A[p * (f + 1) + q] * x[q];
		x[p] = t / A[p * (f + 1) + p];
	}
	for (i = 0; i < m; i++)
	{
		double		t = 0;

		for (p = 0; p < f; p++)
			t += x[p] * v->item_factors[(size_t) i * f + p];
		scores[i] = (float) t;
	}
	free(A);
	free(c);
}

/* Brute force: is (idx, score) list the k best unseen by full sort order? */
static double topk_tol = 0;

static int
is_topk(const float *scores, int64_t n, const uint8_t *excluded, const AffScored *got,
		int64_t kept, int64_t k)
{
	int64_t		r;
	int64_t		j;
	int64_t		avail = 0;

	for (j = 0; j < n; j++)
		avail += !excluded[j];
	if (kept != (avail < k ? avail : k))
		return 0;
	for (r = 0; r < kept; r++)
	{
		int64_t		better = 0;
		int64_t		not_worse = 0;
		double		tol = topk_tol * (1 + fabs(got[r].score));

		if (excluded[got[r].index] || fabs(got[r].score - scores[got[r].index]) > tol)
			return 0;
		for (j = 0; j < n; j++)
		{
			if (excluded[j])
				continue;
			if (scores[j] > got[r].score + tol ||
				(tol == 0 && scores[j] == got[r].score && j < got[r].index))
				better++;
			if (scores[j] >= got[r].score - tol)
				not_worse++;
		}
		if (better > r || not_worse <= r)
			return 0;
	}
	return 1;
}

/* Best first: a higher score, then a lower index (the top-k's order). */
static int
cmp_scored(const void *pa, const void *pb)
{
	const AffScored *a = pa;
	const AffScored *b = pb;

	if (a->score != b->score)
		return a->score > b->score ? -1 : 1;
	return (a->index > b->index) - (a->index < b->index);
}

/*
 * The top-k loop against a full sort, on random scores with many ties,
 * masks, seen lists and candidate lists, at sizes from 1 to several
 * hundred blocks of 16, k from 0 to more than the items, with a score that
 * is not finite (NaN, +inf or -inf) placed at an item before the top (a
 * lower index than every item kept), inside it (one of the items that
 * would be kept) or after it.  The kept list must equal the sorted
 * prefix exactly (ties go to the lower index), and the reported item must
 * be the first considered one whose score is not finite.
 */
static void
test_topk_loop(void)
{
	enum
	{
		MAX_ITEMS = 5000, TRIALS = 3000
	};
	static float scores[MAX_ITEMS];
	static uint8_t skip[MAX_ITEMS];
	static int32_t seen[MAX_ITEMS];
	static int32_t cand[MAX_ITEMS];
	static uint8_t in_cand[MAX_ITEMS];
	static uint8_t in_seen[MAX_ITEMS];
	static AffScored ref[MAX_ITEMS];
	static AffScored heap[MAX_ITEMS + 8];
	int			trial;
	int			fails = 0;
	int			placed[4] = {0};	/* none, before, inside, after: reported */
	int			skipped = 0;

	for (trial = 0; trial < TRIALS; trial++)
	{
		int64_t		n = (int64_t) (trial % 7 == 0 ? 1 + next_u64() % MAX_ITEMS : 1 + next_u64() % 300);
		int64_t		ks[] = {0, 1, 3, 10, 50, n + 5};
		int64_t		k = ks[next_u64() % 6];
		int			dist = (int) (next_u64() % 3);
		int			mask_pct = (int) ((int[]) {0, 10, 50}[next_u64() % 3]);
		int			use_seen = (int) (next_u64() % 2);
		int			use_cand = (int) (next_u64() % 3 == 0);
		int			where = (int) (next_u64() % 4);
		float		odd = (float[]) {NAN, INFINITY, -INFINITY}[next_u64() % 3];
		AffItemFilter flt = {NULL, NULL, 0, NULL, 0};
		AffTopK		t;
		int64_t		n_ref = 0;
		int64_t		want_bad = -1;
		int64_t		got_bad;
		int64_t		kept;
		int64_t		want_kept;
		int64_t		j;
		int64_t		n_seen = 0;
		int64_t		n_cand = 0;
		int			ok = 1;

		for (j = 0; j < n; j++)
		{
			/* few values (ties everywhere), spread values, or one value */
			if (dist == 0)
				scores[j] = (float) (next_u64() % 5);
			else if (dist == 1)
				scores[j] = (float) (next_u64() % 100000) / 1000.0f - 50.0f;
			else
				scores[j] = 0.25f;
			skip[j] = (uint8_t) ((int) (next_u64() % 100) < mask_pct);
			in_seen[j] = (uint8_t) (use_seen && next_u64() % 4 == 0);
			in_cand[j] = (uint8_t) (!use_cand || next_u64() % 3 != 0);
			if (in_seen[j])
				seen[n_seen++] = (int32_t) j;
			if (use_cand && in_cand[j])
				cand[n_cand++] = (int32_t) j;
		}
		if (use_seen)
		{
			flt.seen = seen;
			flt.n_seen = n_seen;
		}
		if (use_cand)
		{
			flt.cand = cand;
			flt.n_cand = n_cand;
		}
		if (mask_pct > 0)
			flt.skip = skip;

		/* the sorted reference before a non-finite score is placed */
		for (j = 0; j < n; j++)
			if (in_cand[j] && !in_seen[j] && !(flt.skip && skip[j]))
			{
				ref[n_ref].score = scores[j];
				ref[n_ref].index = (int32_t) j;
				n_ref++;
			}
		qsort(ref, (size_t) n_ref, sizeof(AffScored), cmp_scored);
		if (where != 0 && n_ref > 0)
		{
			int64_t		top = k < n_ref ? k : n_ref;
			int64_t		lo = n;
			int64_t		hi = -1;
			int64_t		pick = -1;
			int64_t		r;

			for (r = 0; r < top; r++)
			{
				lo = ref[r].index < lo ? ref[r].index : lo;
				hi = ref[r].index > hi ? ref[r].index : hi;
			}
			if (where == 2 && top > 0)
				pick = ref[next_u64() % (uint64_t) top].index;
			else
				for (r = 0; r < n_ref; r++)
				{
					int64_t		c = ref[(r + (int64_t) (next_u64() % (uint64_t) n_ref)) % n_ref].index;

					if ((where == 1 && c < lo) || (where == 3 && c > hi))
					{
						pick = c;
						break;
					}
				}
			if (pick >= 0)
			{
				scores[pick] = odd;
				placed[where]++;
			}
		}
		/* the reference again, the non-finite score left out */
		n_ref = 0;
		for (j = 0; j < n; j++)
			if (in_cand[j] && !in_seen[j] && !(flt.skip && skip[j]))
			{
				if (!isfinite(scores[j]))
				{
					if (want_bad < 0)
						want_bad = j;
					continue;
				}
				ref[n_ref].score = scores[j];
				ref[n_ref].index = (int32_t) j;
				n_ref++;
			}
		qsort(ref, (size_t) n_ref, sizeof(AffScored), cmp_scored);
		want_kept = k < n_ref ? k : n_ref;

		aff_topk_init(&t, heap, k);
		got_bad = aff_topk_scores(scores, n, &flt, &t);
		kept = aff_topk_finish(&t);
		ok = got_bad == want_bad && kept == want_kept;
		for (j = 0; ok && j < kept; j++)
			ok = heap[j].index == ref[j].index && heap[j].score == ref[j].score;
		if (!ok && fails++ < 3)
			printf("     trial %d: n %lld k %lld dist %d mask %d%% seen %d cand %d: bad %lld (want %lld), kept %lld (want %lld)\n",
				   trial, (long long) n, (long long) k, dist, mask_pct, use_seen, use_cand,
				   (long long) got_bad, (long long) want_bad, (long long) kept, (long long) want_kept);
		skipped += n > 160 && !use_cand && k > 0 && k < n_ref;
	}
	check(fails == 0 && placed[1] > 100 && placed[2] > 100 && placed[3] > 100 && skipped > 100,
		  "top-k loop = full sort on 3000 random filters (ties, masks, seen, candidates, NaN/inf before, inside, after the top)",
		  (double) fails, 0);
}

/* Every method: scores, pairs, baskets, item rows, contributions, batch. */
static void
test_method(int method, int64_t users, int64_t items)
{
	Arena		ar = {0};
	AffAllocator a = {arena_alloc, arena_release, &ar};
	AffModelView v;
	const AffMethod *meth = aff_method_by_code(method);
	AffServe	s;
	AffBatch	b;
	AffError	err;
	AffStatus	st;
	int64_t		n_items;
	float	   *scores;
	float	   *scores1;
	uint8_t    *excl;
	double		maxerr = 0;
	double		scale = 0;
	int64_t		u;
	int64_t		i;
	int32_t    *all_users;
	char		what[160];
	int			ok = 1;

	fit_model(&ar, &a, method, users, items, 1, &v);
	n_items = v.h->n_items;
	memset(&s, 0, sizeof(s));
	s.v = &v;
	s.alloc = &a;
	if (meth->needs_gram)
	{
		double	   *g = aff_alloc_array(&a, (size_t) v.h->factors * v.h->factors, sizeof(double));
		float	   *gf = aff_alloc_array(&a, (size_t) v.h->factors * v.h->factors, sizeof(float));
		int			p;
		int			q;

		/* Y^T Y by a plain triple loop, not BLAS */
		for (p = 0; p < v.h->factors; p++)
			for (q = 0; q < v.h->factors; q++)
			{
				double		t = 0;

				for (i = 0; i < n_items; i++)
					t += (double) v.item_factors[i * v.h->factors + p] *
						v.item_factors[i * v.h->factors + q];
				g[p * v.h->factors + q] = t;
			}
		(void) gf;
		s.gram = g;
	}
	if (meth->has_factors)
	{
		float	   *nrm = aff_alloc_array(&a, (size_t) n_items, sizeof(float));
		double		nerr = 0;

		/* the serving norms against sqrt of a double sum of squares */
		aff_row_norms(v.item_factors, n_items, v.h->factors, nrm);
		for (i = 0; i < n_items; i++)
		{
			double		want = sqrt(naive_pair(&(AffModelView)
											   {.h = v.h, .user_factors = v.item_factors,
												.item_factors = v.item_factors}, i, i));

			nerr = fmax(nerr, fabs(nrm[i] - want) / fmax(want, 1e-30));
		}
		snprintf(what, sizeof(what), "%s: item norms = sqrt of the sum of squares (max relative error)",
				 meth->name);
		check(nerr <= 4e-6, what, nerr, 4e-6);	/* measured 3.9e-8 */
		s.item_norms = nrm;
	}

	/* user scores and pair scores against the naive sum */
	scores = aff_alloc_array(&a, (size_t) n_items, sizeof(float));
	scores1 = aff_alloc_array(&a, (size_t) n_items, sizeof(float));
	for (u = 0; u < v.h->n_users; u += 7)
	{
		meth->user_scores(&s, u, scores);
		for (i = 0; i < n_items; i++)
		{
			double		want = naive_pair(&v, u, i);

			maxerr = fmax(maxerr, fabs(scores[i] - want));
			maxerr = fmax(maxerr, fabs(meth->pair_score(&s, u, i) - want));
			scale = fmax(scale, fabs(want));
		}
	}
	snprintf(what, sizeof(what), "%s: user and pair scores = naive sums (max error / scale)", meth->name);
	check(maxerr <= 1e-5 * fmax(scale, 1), what, maxerr / fmax(scale, 1), 1e-5);

	/*
	 * basket of user 3's items: for the weight methods that user's own
	 * scores; for implicit_als the exact solve of the fold-in (Hu, Koren,
	 * Volinsky 2008, eq. 4) formed densely over every item, not the user's
	 * stored vector (solved by CG against the item factors of the previous
	 * sweep, so it is not the fold-in of the final ones)
	 */
	{
		int64_t		lo = v.seen_ptr[3];
		int64_t		n = v.seen_ptr[4] - lo;

		/* the weight methods: a basket without weights is a binary row */
		if (meth->basket_scores(&s, v.seen_items + lo,
								method == AFF_METHOD_IMPLICIT_ALS ? v.seen_weights + lo : NULL,
								n, scores1, &err) != AFF_OK)
			check(0, "basket scores ran", 0, 0);
		maxerr = 0;
		scale = 0;
		if (method == AFF_METHOD_IMPLICIT_ALS)
			exact_fold_in(&v, v.seen_items + lo, v.seen_weights + lo, n, scores);
		else
			meth->user_scores(&s, 3, scores);
		for (i = 0; i < n_items; i++)
		{
			maxerr = fmax(maxerr, fabs(scores1[i] - scores[i]));
			scale = fmax(scale, fabs(scores[i]));
		}
		snprintf(what, sizeof(what), "%s: basket scores = %s (max error / scale)", meth->name,
				 method == AFF_METHOD_IMPLICIT_ALS ? "a dense exact solve of the fold-in" :
				 "the user's own scores");
		check(maxerr <= FOLD_IN_TOL * fmax(scale, 1), what, maxerr / fmax(scale, 1), FOLD_IN_TOL);
		if (method != AFF_METHOD_IMPLICIT_ALS && meth->item_row != NULL)
		{
			/* with weights: each basket item's row of weights, scaled */
			float	   *row = aff_alloc_array(&a, (size_t) n_items, sizeof(float));
			uint8_t    *skip = aff_alloc_array(&a, (size_t) n_items, 1);
			double	   *want = aff_alloc_array(&a, (size_t) n_items, sizeof(double));
			int64_t		t;

			memset(want, 0, sizeof(double) * (size_t) n_items);
			for (t = 0; t < n; t++)
			{
				meth->item_row(&s, v.seen_items[lo + t], row, skip);
				for (i = 0; i < n_items; i++)
					want[i] += (double) v.seen_weights[lo + t] * row[i];
			}
			if (meth->basket_scores(&s, v.seen_items + lo, v.seen_weights + lo, n, scores1,
									&err) != AFF_OK)
				check(0, "weighted basket scores ran", 0, 0);
			maxerr = 0;
			scale = 0;
			for (i = 0; i < n_items; i++)
			{
				maxerr = fmax(maxerr, fabs(scores1[i] - want[i]));
				scale = fmax(scale, fabs(want[i]));
			}
			snprintf(what, sizeof(what), "%s: weighted basket scores = sum of weight x item row (max error / scale)",
					 meth->name);
			/* measured 3.5e-8 (ease), 4.8e-8 (item_knn): float sums */
			check(maxerr <= 1e-6 * fmax(scale, 1), what, maxerr / fmax(scale, 1), 1e-6);
		}
		if (method == AFF_METHOD_IMPLICIT_ALS)
		{
			/* the same model read with linear confidence */
			AffModelHeader hl = *v.h;
			AffModelView vl = v;
			AffServe	sl = s;

			hl.confidence = AFF_CONFIDENCE_LINEAR;
			vl.h = &hl;
			sl.v = &vl;
			if (meth->basket_scores(&sl, v.seen_items + lo, v.seen_weights + lo, n, scores1, &err) != AFF_OK)
				check(0, "basket scores ran", 0, 0);
			exact_fold_in(&vl, v.seen_items + lo, v.seen_weights + lo, n, scores);
			maxerr = 0;
			scale = 0;
			for (i = 0; i < n_items; i++)
			{
				maxerr = fmax(maxerr, fabs(scores1[i] - scores[i]));
				scale = fmax(scale, fabs(scores[i]));
			}
			check(maxerr <= FOLD_IN_TOL * fmax(scale, 1),
				  "implicit_als: basket scores with linear confidence = a dense exact solve",
				  maxerr / fmax(scale, 1), FOLD_IN_TOL);
		}
	}

	/* contributions add up to the fold-in score (ALS) or the pair score */
	if (meth->contributions)
	{
		int64_t		n = v.seen_ptr[6] - v.seen_ptr[5];
		float	   *c = aff_alloc_array(&a, (size_t) n + 1, sizeof(float));
		double		sum = 0;
		double		want;
		int64_t		j;

		if (meth->contributions(&s, 5, 11, c, &err) != AFF_OK)
			check(0, "contributions ran", 0, 0);
		for (j = 0; j < n; j++)
			sum += c[j];
		if (method == AFF_METHOD_IMPLICIT_ALS)
		{
			meth->basket_scores(&s, v.seen_items + v.seen_ptr[5], v.seen_weights + v.seen_ptr[5],
								n, scores1, &err);
			want = scores1[11];
		}
		else
			want = naive_pair(&v, 5, 11);
		snprintf(what, sizeof(what), "%s: contributions add up to the score", meth->name);
		check(fabs(sum - want) <= 1e-4 * fmax(fabs(want), 1), what, sum, want);
	}

	/* item rows: cosine by brute force for factors, the weights otherwise */
	if (meth->item_row)
	{
		excl = aff_alloc(&a, (size_t) n_items);
		meth->item_row(&s, 4, scores, excl);
		maxerr = 0;
		for (i = 0; i < n_items; i++)
		{
			double		want;

			if (method == AFF_METHOD_IMPLICIT_ALS)
			{
				AffModelView iv = {.h = v.h, .user_factors = v.item_factors,
				.item_factors = v.item_factors};

				want = naive_pair(&iv, 4, i) / sqrt(naive_pair(&iv, 4, 4) * naive_pair(&iv, i, i));
			}
			else if (method == AFF_METHOD_EASE)
				want = v.item_weights[4 * n_items + i];
			else
			{
				int64_t		k;

				want = 0;
				for (k = v.neighbor_ptr[4]; k < v.neighbor_ptr[5]; k++)
					if (v.neighbor_idx[k] == i)
						want = v.neighbor_sim[k];
			}
			if (!excl[i])
				maxerr = fmax(maxerr, fabs(scores[i] - want));
		}
		snprintf(what, sizeof(what), "%s: item row = brute-force %s", meth->name,
				 method == AFF_METHOD_IMPLICIT_ALS ? "cosine" : "weights");
		check(maxerr <= 1e-5 && excl[4], what, maxerr, 1e-5);
	}

	/* batch on 3 threads (several blocks) = per-user brute-force top-k */
	all_users = aff_alloc_array(&a, (size_t) v.h->n_users, sizeof(int32_t));
	for (u = 0; u < v.h->n_users; u++)
		all_users[u] = (int32_t) u;
	excl = aff_alloc(&a, (size_t) n_items);
	if (aff_batch_init(&b, &s, 10, true, 3, v.h->n_users, &a, &err) != AFF_OK ||
		aff_batch_run(&b, all_users, v.h->n_users, no_poll, NULL, &err) != AFF_OK)
		check(0, "batch ran", 0, 0);
	/* sgemm and sgemv sum in different orders: scores agree to rounding */
	topk_tol = method == AFF_METHOD_IMPLICIT_ALS ? 1e-5 : 0;
	for (u = 0; u < v.h->n_users && ok; u++)
	{
		int64_t		j;

		meth->user_scores(&s, u, scores);
		memset(excl, 0, (size_t) n_items);
		for (j = v.seen_ptr[u]; j < v.seen_ptr[u + 1]; j++)
			excl[v.seen_items[j]] = 1;
		ok = is_topk(scores, n_items, excl, b.out + u * 10, b.kept[u], 10);
	}
	snprintf(what, sizeof(what), "%s: batch of %lld users in blocks of %d on 3 threads = brute-force top-k",
			 meth->name, (long long) v.h->n_users, b.block);
	check(ok && v.h->n_users > 3 * b.block, what, (double) ok, 1);

	/* the one top-k loop with a mask and a candidate list */
	{
		int32_t		cand[40];
		int64_t		nc = 0;
		AffItemFilter flt = {excl, v.seen_items + v.seen_ptr[2], v.seen_ptr[3] - v.seen_ptr[2],
		cand, 0};
		AffScored	heap[8];
		AffTopK		t;
		uint8_t    *bad = aff_alloc(&a, (size_t) n_items);

		for (i = 0; i < n_items && nc < 40; i += 3)
			cand[nc++] = (int32_t) i;
		flt.n_cand = nc;
		meth->user_scores(&s, 2, scores);
		memset(excl, 0, (size_t) n_items);
		excl[0] = excl[9] = 1;
		aff_topk_init(&t, heap, 8);
		aff_topk_scores(scores, n_items, &flt, &t);
		aff_topk_finish(&t);
		for (i = 0; i < n_items; i++)
			bad[i] = excl[i] || i % 3 != 0 || i / 3 >= 40;
		for (i = v.seen_ptr[2]; i < v.seen_ptr[3]; i++)
			bad[v.seen_items[i]] = 1;
		snprintf(what, sizeof(what), "%s: top-k with mask, seen list and candidates = brute force", meth->name);
		check(is_topk(scores, n_items, bad, heap, t.n, 8), what, 1, 1);
	}
	/* a score that is not finite is never ranked: the kernels name it */
	{
		AffItemFilter flt = {NULL, NULL, 0, NULL, 0};
		AffScored	heap[4];
		AffTopK		t;
		int64_t		bad;
		int			clean = 1;
		int64_t		r;

		meth->user_scores(&s, 1, scores);
		scores[7] = NAN;
		scores[9] = INFINITY;
		aff_topk_init(&t, heap, 4);
		bad = aff_topk_scores(scores, n_items, &flt, &t);
		aff_topk_finish(&t);
		for (r = 0; r < t.n; r++)
			clean &= isfinite(heap[r].score) != 0;
		snprintf(what, sizeof(what), "%s: top-k refuses NaN and infinite scores, naming the first", meth->name);
		check(bad == 7 && clean && t.n == 4, what, (double) bad, 7);
		if (method == AFF_METHOD_IMPLICIT_ALS)
		{
			float		save = v.user_factors[5 * v.h->factors];

			/* the view is our own buffer: make user 5's scores NaN */
			((float *) v.user_factors)[5 * v.h->factors] = NAN;
			st = aff_batch_run(&b, all_users, v.h->n_users, no_poll, NULL, &err);
			((float *) v.user_factors)[5 * v.h->factors] = save;
			check(st == AFF_ERR_NUMERIC && b.bad_user == 5 && b.bad_item == 0,
				  "implicit_als: the batch refuses a user's NaN scores, naming user and item",
				  (double) b.bad_user, 5);
		}
	}
	aff_batch_free(&b, &a);
	arena_free(&ar);
}

/*
 * One implicit_als cg fit through als.c on `m`: losses per sweep into loss,
 * the factors into *X and *Y (malloc'd).
 */
static void
als_run(const AffMatrix *m, const AffAllocator *a, int threads, int64_t budget,
		int sweeps, double *loss, float **X, float **Y)
{
	AffAlsParams p;
	AffAls		s;
	AffError	err;
	int			k;

	memset(&p, 0, sizeof(p));
	p.factors = 16;
	p.iterations = sweeps;
	p.solver = AFF_SOLVER_CG;
	p.solver_steps = 3;
	p.confidence = AFF_CONFIDENCE_LOG;
	p.threads = threads;
	p.regularization = 2;
	p.alpha = 10;
	p.epsilon = 1;
	p.seed = 11;
	p.gather_budget = budget;
	if (aff_als_init(&s, m, &p, a, &err) != AFF_OK)
	{
		printf("FAIL aff_als_init: %s\n", err.msg);
		exit(1);
	}
	for (k = 0; k < sweeps; k++)
		if (aff_als_sweep(&s, &loss[k], no_poll, NULL, &err) != AFF_OK)
		{
			printf("FAIL aff_als_sweep: %s\n", err.msg);
			exit(1);
		}
	*X = malloc(sizeof(float) * m->n_users * p.factors);
	*Y = malloc(sizeof(float) * m->n_items * p.factors);
	memcpy(*X, s.X, sizeof(float) * m->n_users * p.factors);
	memcpy(*Y, s.Y, sizeof(float) * m->n_items * p.factors);
	aff_als_free(&s, a);
}

/* Largest |a - b| / max |b| over n entries. */
static double
max_rel_diff(const float *a, const float *b, int64_t n)
{
	double		worst = 0.0;
	double		scale = 0.0;
	int64_t		i;

	for (i = 0; i < n; i++)
		scale = fmax(scale, fabs(b[i]));
	for (i = 0; i < n; i++)
		worst = fmax(worst, fabs((double) a[i] - b[i]));
	return scale > 0 ? worst / scale : worst;
}

/*
 * Rows longer than the cg gather budget (2048 interactions: here two items
 * that every one of 3000 users bought, and one user who bought every item
 * of 2500) take their own path, the row's system formed once by ssyrk.
 * The factors are the same on 1 and 3 threads, and the fit agrees with
 * the one whose budget (4096) gathers those rows like any other: the same
 * cg iterates, so losses and factors differ by float rounding only.
 */
static void
test_als_long_rows(void)
{
	Arena		ar = {0};
	AffAllocator a = {arena_alloc, arena_release, &ar};
	int64_t		n_users = 3000;
	int64_t		n_items = 2500;
	int64_t		n = n_users * 8 + n_items;
	AffTriple  *rows = malloc(sizeof(AffTriple) * n);
	AffMatrix	m;
	AffError	err;
	double		l1[4], l3[4], lb[4];
	float	   *X1, *Y1, *X3, *Y3, *Xb, *Yb;
	double		worst_loss = 0.0;
	int64_t		i;
	int			k;

	for (i = 0; i < n_users * 8; i++)
	{
		int64_t		u = i / 8;
		int			slot = (int) (i % 8);

		rows[i].user = u + 1;
		rows[i].item = slot == 0 ? 1 : slot == 1 ? 2 :
			(int64_t) (3 + next_u64() % (uint64_t) (n_items - 2));
		rows[i].weight = (float) (1 + next_u64() % 4);
		rows[i].pad = 0;
	}
	for (i = 0; i < n_items; i++)
	{
		AffTriple  *t = &rows[n_users * 8 + i];

		t->user = n_users + 1;	/* the heavy user */
		t->item = i + 1;
		t->weight = 1.0f;
		t->pad = 0;
	}
	if (build(rows, n, &a, &m, &err) != AFF_OK)
	{
		printf("FAIL matrix build: %s\n", err.msg);
		exit(1);
	}
	free(rows);
	check(m.col_ptr[1] - m.col_ptr[0] > 2048 && m.col_ptr[2] - m.col_ptr[1] > 2048 &&
		  m.row_ptr[m.n_users] - m.row_ptr[m.n_users - 1] > 2048,
		  "implicit_als long rows: two items and one user have more than 2048 interactions",
		  (double) (m.col_ptr[1] - m.col_ptr[0]), 2048);
	als_run(&m, &a, 1, 0, 4, l1, &X1, &Y1);
	als_run(&m, &a, 3, 0, 4, l3, &X3, &Y3);
	als_run(&m, &a, 2, 4096, 4, lb, &Xb, &Yb);
	check(memcmp(X1, X3, sizeof(float) * m.n_users * 16) == 0 &&
		  memcmp(Y1, Y3, sizeof(float) * m.n_items * 16) == 0 &&
		  memcmp(l1, l3, sizeof(l1)) == 0,
		  "implicit_als long rows: equal factors and losses on 1 and 3 threads", 1, 1);
	for (k = 0; k < 4; k++)
		worst_loss = fmax(worst_loss, fabs(l1[k] - lb[k]) / fabs(lb[k]));
	/* measured 1.9e-8 (loss) and 6.3e-6 (factors) */
	check(worst_loss < 1e-6, "implicit_als long rows: loss per sweep as with every row gathered",
		  worst_loss, 1e-6);
	check(max_rel_diff(X1, Xb, m.n_users * 16) < 5e-5 &&
		  max_rel_diff(Y1, Yb, m.n_items * 16) < 5e-5,
		  "implicit_als long rows: factors as with every row gathered (relative to the largest)",
		  fmax(max_rel_diff(X1, Xb, m.n_users * 16), max_rel_diff(Y1, Yb, m.n_items * 16)), 5e-5);
	free(X1);
	free(Y1);
	free(X3);
	free(Y3);
	free(Xb);
	free(Yb);
	arena_free(&ar);
}

/* The ALS fit: the same factors on 1 and 4 threads, and divergence refused. */
static void
test_als_fit(void)
{
	Arena		ar = {0};
	AffAllocator a = {arena_alloc, arena_release, &ar};
	AffModelView v1;
	AffModelView v4;
	uint64_t	save = rng;

	fit_model(&ar, &a, AFF_METHOD_IMPLICIT_ALS, 700, 90, 1, &v1);
	rng = save;
	fit_model(&ar, &a, AFF_METHOD_IMPLICIT_ALS, 700, 90, 4, &v4);
	check(memcmp(v1.user_factors, v4.user_factors,
				 sizeof(float) * v1.h->n_users * v1.h->factors) == 0 &&
		  memcmp(v1.item_factors, v4.item_factors,
				 sizeof(float) * v1.h->n_items * v1.h->factors) == 0,
		  "implicit_als: 700 users (11 blocks of 64) give equal factors on 1 and 4 threads", 1, 1);
	arena_free(&ar);

	/* a NaN regularization makes the loss NaN: the fit must say it diverged */
	{
		AffTriple	rows[3] = {{1, 1, 1, 0}, {2, 1, 2, 0}, {2, 2, 1, 0}};
		AffMatrix	m;
		AffOptions	o = {0};
		AffModelParts parts;
		AffFitContext cx = {0};
		AffError	err;
		AffStatus	st;
		Arena		ar2 = {0};
		AffAllocator a2 = {arena_alloc, arena_release, &ar2};

		build(rows, 3, &a2, &m, &err);
		o.method = AFF_METHOD_IMPLICIT_ALS;
		o.factors = 2;
		o.iterations = 2;
		o.solver = AFF_SOLVER_CHOLESKY;
		o.solver_steps = 3;
		o.confidence = AFF_CONFIDENCE_LOG;
		o.threads = 1;
		o.regularization = NAN;
		o.alpha = 1;
		o.epsilon = 1;
		cx.alloc = &a2;
		cx.poll = no_poll;
		aff_fit_header(&parts, &o, &m, AFF_KEYS_BIGINT);
		st = aff_fit_run(&m, &o, &cx, &parts, &err);
		printf("     (%s / %s)\n", err.msg, err.detail);
		check(st == AFF_ERR_NUMERIC && strstr(err.msg, "diverged") != NULL,
			  "implicit_als: a non-finite loss is refused as divergence", st, AFF_ERR_NUMERIC);
		o.confidence = AFF_CONFIDENCE_LINEAR;
		o.regularization = 1;
		o.alpha = 6e11;			/* weight 1: 6e11 + 1; weight 2: 1.2e12, over */
		st = aff_fit_run(&m, &o, &cx, &parts, &err);
		check(st == AFF_ERR_NUMERIC && strstr(err.detail, "User 2, item 1") != NULL,
			  "implicit_als: a confidence over 1e12 is refused naming the interaction", st,
			  AFF_ERR_NUMERIC);
		arena_free(&ar2);
	}
}

/* The fit's one memory guard: the limit's edge, no limit, and the figures it names. */
static void
test_memory_guard(void)
{
	const double mb = 1024.0 * 1024.0;
	AffFitMemory need = {0};
	AffError	err;
	AffStatus	st;

	need.bytes = 2 * mb;
	need.step = "Collecting the rows";
	need.interactions = 4855;
	need.users = 4855;
	need.items = 4855;
	need.at_most = true;
	check(aff_fit_memory_guard(2 * mb, "the limit", &need, &err) == AFF_OK,
		  "memory guard: a need equal to the limit passes", 2, 2);
	check(aff_fit_memory_guard(0, "the limit", &need, &err) == AFF_OK,
		  "memory guard: a limit of 0 is no limit", 0, 0);
	st = aff_fit_memory_guard(1 * mb, "the limit", &need, &err);
	printf("     (%s / %s / %s)\n", err.msg, err.detail, err.hint);
	check(st == AFF_ERR_LIMIT &&
		  strcmp(err.msg, "affinity.fit would need about 2 MB, over the limit") == 0 &&
		  strcmp(err.detail, "Collecting the rows: 4855 interactions of at most 4855 users and 4855 items; the limit is 1 MB.") == 0 &&
		  strcmp(err.hint, "Raise the limit, or fit on fewer rows.") == 0,
		  "memory guard: 2 MB over a 1 MB limit is refused with its figures", st, AFF_ERR_LIMIT);
	need.text_keys = 200;
	need.text_bytes = 200 * mb;
	need.text_held_bytes = 210 * mb;
	need.bytes = 420 * mb;
	st = aff_fit_memory_guard(16 * mb, "the limit", &need, &err);
	check(st == AFF_ERR_LIMIT &&
		  strstr(err.detail, "and 200 distinct text keys of 200.0 MB (210.0 MB with their dictionaries)") != NULL,
		  "memory guard: the detail names the text keys", st, AFF_ERR_LIMIT);
}

static int
stop_poll(void *arg)
{
	(void) arg;
	return 1;
}

/*
 * Sequential rules: the build's kept rules against the naive sums of the
 * rule (1 / distance between steps within the window, no rule inside a
 * step or from an item to itself), the cut to the heaviest successors,
 * the memory limit and a cancel.  About 93,000 events: more than one run
 * of the build's polled sort, so its merge is exercised too.
 */
static void
test_sequences(void)
{
	enum
	{
		NSEQ = 6000, NIT = 150, WIN = 4, MAXLEN = 30
	};
	AffEvent   *ev = malloc(sizeof(AffEvent) * NSEQ * MAXLEN);
	AffEvent   *copy = malloc(sizeof(AffEvent) * NSEQ * MAXLEN);
	double	   *W = calloc((size_t) NIT * NIT, sizeof(double));
	int64_t		n = 0;
	int64_t		s;
	int			succ;

	for (s = 0; s < NSEQ; s++)
	{
		int			len = 1 + (int) (next_u64() % MAXLEN);
		int64_t		first = n;
		int64_t		a;
		int64_t		b;

		for (a = 0; a < len; a++)
		{
			uint64_t	r = next_u64();

			ev[n].seq = 7 * s - 5000;
			ev[n].pos = (int64_t) (r % 12) * 1000;
			/* item keys 3 * j, with a skew towards small j */
			ev[n].item = 3 * (int64_t) ((r >> 8) % (1 + (r >> 20) % NIT));
			n++;
		}
		/* naive sums: distinct (position, item) events; step = rank of the position */
		for (a = first; a < n; a++)
			for (b = first; b < n; b++)
			{
				int64_t		c;
				int			dup = 0;
				int			da = 0;
				int			db = 0;
				int64_t		seen[12] = {0};

				for (c = first; c < a && !dup; c++)
					dup = ev[c].pos == ev[a].pos && ev[c].item == ev[a].item;
				for (c = first; c < b && !dup; c++)
					dup = ev[c].pos == ev[b].pos && ev[c].item == ev[b].item;
				if (dup || ev[b].pos <= ev[a].pos || ev[a].item == ev[b].item)
					continue;
				for (c = first; c < n; c++)
					seen[ev[c].pos / 1000] = 1;
				for (c = 0; c < ev[a].pos / 1000; c++)
					da += (int) seen[c];
				for (c = 0; c < ev[b].pos / 1000; c++)
					db += (int) seen[c];
				if (db - da <= WIN)
					W[(ev[a].item / 3) * NIT + ev[b].item / 3] += 1.0 / (db - da);
			}
	}
	for (succ = 0; succ < 2; succ++)
	{
		Arena		ar = {0};
		AffAllocator a = {arena_alloc, arena_release, &ar};
		AffSeqParams p = {WIN, succ == 0 ? 100000 : 3, AFF_POSITION_NUMBER, 0, 0, no_poll, NULL};
		AffSeqBuild out;
		AffModelParts parts;
		AffError	err;
		AffStatus	st;
		double		worst = 0;
		int64_t		missing = 0;
		int64_t		bad_cut = 0;
		int64_t		i;

		memcpy(copy, ev, sizeof(AffEvent) * n);
		memset(&parts, 0, sizeof(parts));
		st = aff_sequences_build(copy, n, &p, &a, &parts, &out, &err);
		check(st == AFF_OK, "sequential_rules: the build succeeds", st, AFF_OK);
		if (st != AFF_OK)
		{
			arena_free(&ar);
			continue;
		}
		{
			const int64_t *ptr = parts.data[AFF_SEC_NEIGHBOR_PTR];
			const int32_t *idx = parts.data[AFF_SEC_NEIGHBOR_IDX];
			const float *w = parts.data[AFF_SEC_NEIGHBOR_SIM];
			const int64_t *keys = parts.data[AFF_SEC_ITEM_KEYS];
			int64_t		total = 0;

			for (i = 0; i < out.n_items; i++)
			{
				int64_t		pi = keys[i] / 3;
				int64_t		j;
				int64_t		rules = 0;
				double		kth = 0;

				for (j = 0; j < NIT; j++)
					rules += W[pi * NIT + j] > 0;
				total += rules;
				for (j = ptr[i]; j < ptr[i + 1]; j++)
				{
					double		want = W[pi * NIT + keys[idx[j]] / 3];

					if (want <= 0)
						missing++;
					else if (fabs(w[j] - want) / want > worst)
						worst = fabs(w[j] - want) / want;
					kth = w[j];
				}
				if (ptr[i + 1] - ptr[i] != (rules < p.successors ? rules : p.successors))
					bad_cut++;
				/* nothing left out weighs more than the lightest kept */
				for (j = 0; j < NIT && ptr[i + 1] > ptr[i]; j++)
				{
					int64_t		k;
					int			kept = 0;

					for (k = ptr[i]; k < ptr[i + 1]; k++)
						kept |= keys[idx[k]] / 3 == j;
					if (!kept && W[pi * NIT + j] > kth * (1 + 1e-6))
						bad_cut++;
				}
			}
			if (succ == 0)
			{
				int64_t		rules = ((const int64_t *) parts.data[AFF_SEC_SEQUENCE_INFO])[AFF_SINFO_RULES];

				check(rules == total, "sequential_rules: the distinct rules are the naive count",
					  (double) rules, (double) total);
			}
		}
		check(missing == 0 && worst < 1e-6,
			  succ == 0 ? "sequential_rules: every rule weight equals the naive sum (all kept; max relative error)" :
			  "sequential_rules: kept weights equal the naive sums (3 successors; max relative error)", worst, 1e-6);
		check(bad_cut == 0, succ == 0 ? "sequential_rules: every rule is kept" :
			  "sequential_rules: each item keeps its 3 heaviest rules", (double) bad_cut, 0);
		arena_free(&ar);
	}
	{
		Arena		ar = {0};
		AffAllocator a = {arena_alloc, arena_release, &ar};
		AffSeqParams p = {WIN, 100000, AFF_POSITION_NUMBER, 0, 0, stop_poll, NULL};
		AffSeqBuild out;
		AffModelParts parts;
		AffError	err;
		AffStatus	st;

		memcpy(copy, ev, sizeof(AffEvent) * n);
		memset(&parts, 0, sizeof(parts));
		st = aff_sequences_build(copy, n, &p, &a, &parts, &out, &err);
		check(st == AFF_ERR_CANCELLED, "sequential_rules: a poll asking to stop cancels the build",
			  st, AFF_ERR_CANCELLED);
		arena_free(&ar);
		memcpy(copy, ev, sizeof(AffEvent) * n);
		p.poll = no_poll;
		p.memory_limit = 64 * 1024;
		memset(&parts, 0, sizeof(parts));
		st = aff_sequences_build(copy, n, &p, &a, &parts, &out, &err);
		check(st == AFF_ERR_LIMIT && strstr(err.hint, "successors") != NULL,
			  "sequential_rules: the kept rules stop at the memory limit", st, AFF_ERR_LIMIT);
		arena_free(&ar);
	}
	free(ev);
	free(copy);
	free(W);
}

int
main(void)
{
	test_topk_loop();
	test_method(AFF_METHOD_IMPLICIT_ALS, 400, 120);
	test_method(AFF_METHOD_POPULARITY, 300, 80);
	test_method(AFF_METHOD_EASE, 300, 80);
	test_method(AFF_METHOD_ITEM_KNN, 300, 80);
	test_als_fit();
	test_als_long_rows();
	test_memory_guard();
	test_sequences();
	printf("%s: %d failure(s)\n", failures ? "FAILED" : "passed", failures);
	return failures ? 1 : 0;
}
