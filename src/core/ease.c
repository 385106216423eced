/*
 * ease.c
 *		The EASE fit (Steck 2019, "Embarrassingly Shallow Autoencoders for
 *		Sparse Data", WWW 2019): item-item weights in closed form.
 *
 * With X the binary users x items matrix of the training pairs, the weights
 * minimise |X - X B|^2 + lambda |B|^2 subject to diag(B) = 0, and the paper's
 * solution is
 *		P = (X^T X + lambda I)^-1,	B_ij = -P_ij / P_jj (i != j),	B_ii = 0.
 *
 * The Gram matrix of a sparse 0/1 matrix is a count of co-occurrences, so it
 * is built from the two CSR views rather than with dense BLAS (which would
 * cost users x items^2 multiplications, mostly by zero): row i of G is owned
 * by one thread, which walks item i's users and, for each, the user's items
 * j >= i.  That costs sum over users of |items of u|^2 / 2 additions, writes
 * one row at a time (cache friendly, no atomics), and counts exactly, so G
 * is the same for any thread count.  The inverse is a Cholesky
 * factorisation and inverse in double precision, the steps of LAPACK's
 * dpotrf and dpotri done block by block with OpenBLAS (so that a cancel
 * is noticed between blocks); this is where the items^3 cost lies.
 *
 * Layout: G and P are n x n row-major doubles of which only the entries
 * j >= i of each row i are used (the lower triangle in LAPACK's
 * column-major terms, hence uplo "L"); B is the full n x n row-major float
 * matrix.
 */
#include "ease.h"
#include "parallel.h"

#include <cblas.h>
#include <math.h>
#include <string.h>

/*
 * LAPACK through OpenBLAS.  The trailing size_t arguments are the hidden
 * lengths of the character arguments that Fortran compilers pass; LAPACK
 * routines written in C ignore them.
 */
extern void dpotrf_(const char *uplo, const int *n, double *a, const int *lda,
					int *info, size_t uplo_len);
extern void dtrtri_(const char *uplo, const char *diag, const int *n, double *a,
					const int *lda, int *info, size_t uplo_len, size_t diag_len);
extern void dlauum_(const char *uplo, const int *n, double *a, const int *lda,
					int *info, size_t uplo_len);

#define GRAM_ROWS_PER_BLOCK		8
#define WEIGHT_ROWS_PER_BLOCK	64
#define INVERT_BLOCK			256

size_t
aff_ease_work_bytes(int64_t n_items)
{
	size_t		cells;
	size_t		bytes;

	if (n_items < 0 ||
		aff_mul_overflows((size_t) n_items, (size_t) n_items, &cells) ||
		aff_mul_overflows(cells, sizeof(double) + sizeof(float), &bytes))
		return 0;
	return bytes;
}

/* First position in idx[0..n) holding a value >= key (n when none). */
static int64_t
lower_bound_i32(const int32_t *idx, int64_t n, int32_t key)
{
	int64_t		lo = 0;
	int64_t		hi = n;

	while (lo < hi)
	{
		int64_t		mid = lo + (hi - lo) / 2;

		if (idx[mid] < key)
			lo = mid + 1;
		else
			hi = mid;
	}
	return lo;
}

typedef struct GramJob
{
	const AffMatrix *m;
	double		lambda;
	double	   *G;
} GramJob;

/* Rows [begin, end) of G: co-occurrence counts j >= i, lambda added on i = j. */
static void
gram_rows(void *arg, int thread_no, int64_t block_no, int64_t begin,
		  int64_t end)
{
	GramJob    *job = arg;
	const AffMatrix *m = job->m;
	int64_t		n = m->n_items;
	int64_t		i;

	(void) thread_no;
	(void) block_no;
	for (i = begin; i < end; i++)
	{
		double	   *row = job->G + (size_t) i * n;
		int64_t		c;

		memset(row, 0, sizeof(double) * (size_t) n);
		for (c = m->col_ptr[i]; c < m->col_ptr[i + 1]; c++)
		{
			int32_t		u = m->col_idx[c];
			const int32_t *items = m->row_idx + m->row_ptr[u];
			int64_t		len = m->row_ptr[u + 1] - m->row_ptr[u];
			int64_t		p;

			for (p = lower_bound_i32(items, len, (int32_t) i); p < len; p++)
				row[items[p]] += 1.0;
		}
		row[i] += job->lambda;
	}
}

/*
 * G = X^T X + lambda I for the binary matrix of m's training pairs (the
 * summed weights are not used, as in the paper).  G holds n_items^2
 * doubles; rows are filled on the worker threads.
 */
AffStatus
aff_ease_gram(const AffMatrix *m, double lambda, int threads, double *G,
			  AffPollFn poll, void *poll_arg, AffError *err)
{
	GramJob		job;

	job.m = m;
	job.lambda = lambda;
	job.G = G;
	return aff_parallel_for(threads, m->n_items, GRAM_ROWS_PER_BLOCK,
							gram_rows, &job, poll, poll_arg, err);
}

/* &A(r, c) of the column-major matrix A with leading dimension n */
static inline double *
at(double *A, int n, int r, int c)
{
	return A + (size_t) c * n + r;
}

static inline int
block_len(int n, int start)
{
	return n - start < INVERT_BLOCK ? n - start : INVERT_BLOCK;
}

static AffStatus
cancelled(AffPollFn poll, void *poll_arg, AffError *err)
{
	if (poll != NULL && poll(poll_arg))
		return aff_fail(err, AFF_ERR_CANCELLED, "the computation was cancelled");
	return AFF_OK;
}

/*
 * A = L L^T in place (lower triangle), blocked right-looking: factor the
 * diagonal block, solve the panel below it, update the trailing matrix.
 */
static AffStatus
cholesky_lower(double *A, int n, double lambda, AffPollFn poll, void *poll_arg,
			   AffError *err)
{
	int			k;

	for (k = 0; k < n; k += INVERT_BLOCK)
	{
		int			kb = block_len(n, k);
		int			rest = n - k - kb;
		int			info = 0;

		if (cancelled(poll, poll_arg, err) != AFF_OK)
			return err->status;
		dpotrf_("L", &kb, at(A, n, k, k), &n, &info, 1);
		if (info > 0)
		{
			aff_fail(err, AFF_ERR_NUMERIC, "the EASE Gram matrix is not positive definite");
			return aff_detail(err, "The Cholesky factorisation failed at item index %d with regularization %g.",
							  k + info - 1, lambda);
		}
		if (rest == 0)
			break;
		cblas_dtrsm(CblasColMajor, CblasRight, CblasLower, CblasTrans, CblasNonUnit,
					rest, kb, 1.0, at(A, n, k, k), n, at(A, n, k + kb, k), n);
		cblas_dsyrk(CblasColMajor, CblasLower, CblasNoTrans, rest, kb, -1.0,
					at(A, n, k + kb, k), n, 1.0, at(A, n, k + kb, k + kb), n);
	}
	return AFF_OK;
}

/*
 * L := L^-1 in place, blocked from the last diagonal block up: with the
 * trailing part already inverted, the panel below block j becomes
 * -L22^-1 L21 L11^-1, then block j itself is inverted.
 */
static AffStatus
invert_lower(double *A, int n, AffPollFn poll, void *poll_arg, AffError *err)
{
	int			j;

	for (j = ((n - 1) / INVERT_BLOCK) * INVERT_BLOCK; j >= 0; j -= INVERT_BLOCK)
	{
		int			jb = block_len(n, j);
		int			rest = n - j - jb;
		int			info = 0;

		if (cancelled(poll, poll_arg, err) != AFF_OK)
			return err->status;
		if (rest > 0)
		{
			cblas_dtrmm(CblasColMajor, CblasLeft, CblasLower, CblasNoTrans, CblasNonUnit,
						rest, jb, 1.0, at(A, n, j + jb, j + jb), n, at(A, n, j + jb, j), n);
			cblas_dtrsm(CblasColMajor, CblasRight, CblasLower, CblasNoTrans, CblasNonUnit,
						rest, jb, -1.0, at(A, n, j, j), n, at(A, n, j + jb, j), n);
		}
		dtrtri_("L", "N", &jb, at(A, n, j, j), &n, &info, 1, 1);
		if (info != 0)
			return aff_fail(err, AFF_ERR_NUMERIC, "the EASE Cholesky factor is singular at item index %d",
							j + info - 1);
	}
	return AFF_OK;
}

/*
 * A := L^T L in place (lower triangle) for the lower triangular L in A,
 * blocked by block rows: block row i of the product takes L_ii^T times
 * the part left of it, the product of the diagonal block, and the
 * contributions of the block rows below.
 */
static AffStatus
lower_gram(double *A, int n, AffPollFn poll, void *poll_arg, AffError *err)
{
	int			i;

	for (i = 0; i < n; i += INVERT_BLOCK)
	{
		int			ib = block_len(n, i);
		int			rest = n - i - ib;
		int			info = 0;

		if (cancelled(poll, poll_arg, err) != AFF_OK)
			return err->status;
		if (i > 0)
			cblas_dtrmm(CblasColMajor, CblasLeft, CblasLower, CblasTrans, CblasNonUnit,
						ib, i, 1.0, at(A, n, i, i), n, at(A, n, i, 0), n);
		dlauum_("L", &ib, at(A, n, i, i), &n, &info, 1);
		if (rest == 0)
			continue;
		if (i > 0)
			cblas_dgemm(CblasColMajor, CblasTrans, CblasNoTrans, ib, i, rest, 1.0,
						at(A, n, i + ib, i), n, at(A, n, i + ib, 0), n, 1.0, at(A, n, i, 0), n);
		cblas_dsyrk(CblasColMajor, CblasLower, CblasTrans, ib, rest, 1.0,
					at(A, n, i + ib, i), n, 1.0, at(A, n, i, i), n);
	}
	return AFF_OK;
}

/*
 * Invert the symmetric positive definite G in place (the j >= i entries of
 * each row): G = L L^T, then G^-1 = L^-T L^-1, the steps of LAPACK's
 * dpotri, written out by blocks of INVERT_BLOCK items so that poll is
 * called every fraction of a second (one LAPACK call over 10,000 items
 * would run for tens of seconds without a chance to stop).  OpenBLAS may
 * use `threads` threads inside each call; it is set back to one on every
 * path.  Must run on the calling thread with no worker running.  Fails
 * with AFF_ERR_NUMERIC when G is not positive definite.
 */
AffStatus
aff_ease_invert(double *G, int64_t n, int threads, double lambda,
				AffPollFn poll, void *poll_arg, AffError *err)
{
	AffStatus	st;

	if (n < 1 || n > 0x7fffffff)
		return aff_fail(err, AFF_ERR_LIMIT, "EASE cannot invert a matrix of %lld items",
						(long long) n);
	openblas_set_num_threads(threads);
	st = cholesky_lower(G, (int) n, lambda, poll, poll_arg, err);
	if (st == AFF_OK)
		st = invert_lower(G, (int) n, poll, poll_arg, err);
	if (st == AFF_OK)
		st = lower_gram(G, (int) n, poll, poll_arg, err);
	openblas_set_num_threads(1);
	return st;
}

typedef struct WeightJob
{
	const double *P;
	int64_t		n;
	float	   *B;
} WeightJob;

/*
 * Rows [begin, end) of B.  P_ij for j < i lives at P[j][i]; walking j in
 * the outer loop reads that part along a row of P, so both triangles are
 * read in long runs.
 */
static void
weight_rows(void *arg, int thread_no, int64_t block_no, int64_t begin,
			int64_t end)
{
	WeightJob  *job = arg;
	const double *P = job->P;
	int64_t		n = job->n;
	int64_t		i;
	int64_t		j;

	(void) thread_no;
	(void) block_no;
	for (j = 0; j < n; j++)
	{
		double		pjj = P[(size_t) j * n + j];

		for (i = begin; i < end; i++)
		{
			double		pij = j >= i ? P[(size_t) i * n + j] : P[(size_t) j * n + i];

			job->B[(size_t) i * n + j] = i == j ? 0.0f : (float) (-pij / pjj);
		}
	}
}

/*
 * B = I - P diag(1 / diag P) with a zero diagonal, as n x n row-major
 * floats, from the inverse P left by aff_ease_invert.
 */
AffStatus
aff_ease_weights(const double *P, int64_t n, int threads, float *B,
				 AffPollFn poll, void *poll_arg, AffError *err)
{
	WeightJob	job;
	int64_t		j;

	for (j = 0; j < n; j++)
		if (!(P[(size_t) j * n + j] > 0.0) || !isfinite(P[(size_t) j * n + j]))
		{
			aff_fail(err, AFF_ERR_NUMERIC, "the EASE inverse has a bad diagonal");
			return aff_detail(err, "Entry %lld of the diagonal is %g.",
							  (long long) j, P[(size_t) j * n + j]);
		}
	job.P = P;
	job.n = n;
	job.B = B;
	return aff_parallel_for(threads, n, WEIGHT_ROWS_PER_BLOCK, weight_rows,
							&job, poll, poll_arg, err);
}
