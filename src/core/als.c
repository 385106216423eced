/*
 * als.c
 *		The implicit-feedback ALS fit.
 *
 * Objective (Hu, Koren, Volinsky 2008, eq. 3), over all user-item pairs:
 *		sum_{u,i} c_ui (p_ui - x_u . y_i)^2 + lambda (sum |x_u|^2 + sum |y_i|^2)
 * with p_ui = 1 for observed pairs (0 otherwise) and c_ui = 1 + alpha f(w_ui)
 * for observed pairs (1 otherwise).  With the other side fixed, row u solves
 *		(Y^T Y + Y^T (C_u - I) Y + lambda I) x_u = Y^T C_u p_u,
 * where Y^T Y (the Gram matrix) is shared by all rows and computed once per
 * half-sweep with BLAS, and the rest only touches the row's observed items.
 *
 * The loss uses the same Gram trick: the sum over all items of s^2 is
 * x^T (Y^T Y) x, and observed items correct it by c(1 - s)^2 - s^2.
 *
 * Rows are solved in blocks by aff_parallel_for (cg in single precision on
 * gathered vectors, Cholesky in double; see solve_cg_block); each row's
 * result depends only on its inputs, the blocks only on the matrix, and
 * per-block sums are added in block order, so the model does not depend on
 * which thread did what.
 */
#include "als.h"
#include "parallel.h"

#include <cblas.h>
#include <math.h>
#include <stdatomic.h>
#include <stdlib.h>
#include <string.h>

#define ROWS_PER_BLOCK 64
/* Rows of scaled factors gathered per dsyrk call in build_system. */
#define SYRK_ROWS 64

/*
 * Kernels.  The per-row work is dense f-length loops; "omp simd" lets the
 * compiler vectorise their reductions (built with -fopenmp-simd, no OpenMP
 * runtime), and the per-row entry points are compiled three times
 * (AVX-512, AVX2, baseline) and picked at load time for the CPU at hand,
 * so speed does not hang on OpenBLAS's own kernel choice.  Results of the
 * versions agree to rounding (sums are reassociated).  The cloned
 * functions are static, behind plain entry points: GCC gives the
 * dispatching symbol of an extern cloned function default visibility
 * whatever -fvisibility says, and the library exports only what PostgreSQL
 * looks up.
 */
#if defined(__x86_64__) && defined(__GNUC__) && !defined(__clang__) && !defined(AFF_NO_CLONES)
#define AFF_KERNEL __attribute__((target_clones("avx512f", "avx2", "default")))
#else
#define AFF_KERNEL
#endif
#define AFF_INLINE static inline __attribute__((always_inline))

double
aff_confidence(int kind, double alpha, double epsilon, double w)
{
	if (kind == AFF_CONFIDENCE_LINEAR)
		return 1.0 + alpha * w;
	return 1.0 + alpha * log1p(w / epsilon);
}

/*
 * gram = F^T F (f x f, full symmetric, double) for F with n rows of f
 * floats.  gram_f is BLAS's float output buffer.  Called only from the
 * engine's calling thread while no worker runs, so OpenBLAS may use its own
 * threads here.
 */
void
aff_gram(const float *F, int64_t n, int f, int threads, float *gram_f,
		 double *gram)
{
	int			a;
	int			b;

	openblas_set_num_threads(threads);
	cblas_ssyrk(CblasRowMajor, CblasUpper, CblasTrans, f, (int) n, 1.0f,
				F, f, 0.0f, gram_f, f);
	openblas_set_num_threads(1);
	for (a = 0; a < f; a++)
		for (b = a; b < f; b++)
		{
			gram[a * f + b] = gram_f[a * f + b];
			gram[b * f + a] = gram_f[a * f + b];
		}
}

AFF_INLINE double
dot_fd(const float *y, const double *x, int f)
{
	double		s = 0.0;
	int			k;

#pragma omp simd reduction(+:s)
	for (k = 0; k < f; k++)
		s += (double) y[k] * x[k];
	return s;
}

/* out += t * y */
AFF_INLINE void
axpy_fd(double t, const float *y, double *out, int f)
{
	int			k;

#pragma omp simd
	for (k = 0; k < f; k++)
		out[k] += t * y[k];
}

AFF_INLINE double
dot_dd(const double *a, const double *b, int f)
{
	double		s = 0.0;
	int			k;

#pragma omp simd reduction(+:s)
	for (k = 0; k < f; k++)
		s += a[k] * b[k];
	return s;
}

/* out = (G + lambda I) v */
AFF_INLINE void
gram_times(const double *G, int f, double lambda, const double *v, double *out)
{
	int			a;
	int			k;

	for (a = 0; a < f; a++)
	{
		const double *row = G + (size_t) a * f;
		double		s = lambda * v[a];

#pragma omp simd reduction(+:s)
		for (k = 0; k < f; k++)
			s += row[k] * v[k];
		out[a] = s;
	}
}

/* Doubles of scratch one row solve needs. */
size_t
aff_solve_scratch_len(int f)
{
	return (size_t) f * f + 5 * (size_t) f + (size_t) SYRK_ROWS * f;
}

/*
 * Lower triangle of A = G + lambda I + sum (c-1) y y^T into A (f x f), and
 * b = sum c y into b when b is not NULL.
 */
/* LAPACK through OpenBLAS (Fortran interface: hidden string lengths last) */
extern void dpotrf_(const char *uplo, const int *n, double *a, const int *lda,
					int *info, size_t uplo_len);
extern void dpotrs_(const char *uplo, const int *n, const int *nrhs, const double *a,
					const int *lda, double *b, const int *ldb, int *info, size_t uplo_len);

AFF_INLINE void
build_system(const float *F, const double *G, int f, double lambda,
			 const int32_t *idx, const float *conf, int64_t len,
			 double *A, double *b, double *Z)
{
	int64_t		j;
	int			r;
	int			c;

	for (r = 0; r < f; r++)
	{
		for (c = 0; c <= r; c++)
			A[r * f + c] = G[r * f + c];
		A[r * f + r] += lambda;
		if (b != NULL)
			b[r] = 0.0;
	}
	/*
	 * A += sum (c - 1) y y^T as dsyrk over chunks of rows sqrt(c - 1) y:
	 * BLAS-3 speed instead of one rank-1 update per interaction.
	 */
	for (j = 0; j < len; j += SYRK_ROWS)
	{
		int			n = (int) (len - j < SYRK_ROWS ? len - j : SYRK_ROWS);
		int			q;

		for (q = 0; q < n; q++)
		{
			const float *y = F + (size_t) idx[j + q] * f;
			double		sc = sqrt((double) conf[j + q] - 1.0);
			double		cj = conf[j + q];
			double	   *z = Z + (size_t) q * f;

			for (r = 0; r < f; r++)
				z[r] = sc * y[r];
			if (b != NULL)
				for (r = 0; r < f; r++)
					b[r] += cj * y[r];
		}
		cblas_dsyrk(CblasRowMajor, CblasLower, CblasTrans, f, n, 1.0, Z, f, 1.0, A, f);
	}
}

/*
 * Solve A x = b by Cholesky (LAPACK dpotrf/dpotrs; A's row-major lower
 * triangle is the column-major upper one).  A is overwritten.  Returns 0
 * when A is not positive definite.
 */
AFF_INLINE int
cholesky_solve(double *A, const double *b, int f, double *x)
{
	int			info = 0;
	int			one = 1;
	int			k;

	dpotrf_("U", &f, A, &f, &info, 1);
	if (info != 0)
		return 0;
	for (k = 0; k < f; k++)
		x[k] = b[k];
	dpotrs_("U", &f, &one, A, &f, x, &f, &info, 1);
	return info == 0;
}

/* The exact row solve of the fit. */
AFF_INLINE int
solve_cholesky(const float *F, const double *G, int f, double lambda,
			   const int32_t *idx, const float *conf, int64_t len,
			   double *x, double *scratch)
{
	double	   *A = scratch;
	double	   *b = scratch + (size_t) f * f;

	build_system(F, G, f, lambda, idx, conf, len, A, b,
				 scratch + (size_t) f * f + 5 * (size_t) f);
	return cholesky_solve(A, b, f, x);
}

/*
 * Solve the row's system A z = rhs for another right-hand side (used to
 * explain scores: z = A^-1 y_i).  scratch as for aff_solve_row.
 */
AFF_KERNEL static int
solve_system_kernel(const float *F, const double *gram, int f, double lambda,
					const int32_t *idx, const float *conf, int64_t len,
					const float *rhs, float *z, double *scratch)
{
	double	   *A = scratch;
	double	   *b = scratch + (size_t) f * f;
	double	   *x = b + f;
	int			k;

	build_system(F, gram, f, lambda, idx, conf, len, A, NULL,
				 scratch + (size_t) f * f + 5 * (size_t) f);
	for (k = 0; k < f; k++)
		b[k] = rhs[k];
	if (!cholesky_solve(A, b, f, x))
		return 0;
	for (k = 0; k < f; k++)
		z[k] = (float) x[k];
	return 1;
}

/* The entry point of solve_system_kernel. */
int
aff_solve_system(const float *F, const double *gram, int f, double lambda,
				 const int32_t *idx, const float *conf, int64_t len,
				 const float *rhs, float *z, double *scratch)
{
	return solve_system_kernel(F, gram, f, lambda, idx, conf, len, rhs, z, scratch);
}

/* out = A v for the row's system A = G + lambda I + sum (c-1) y y^T */
AFF_INLINE void
row_system_times(const float *F, const double *G, int f, double lambda,
				 const int32_t *idx, const float *conf, int64_t len,
				 const double *v, double *out)
{
	int64_t		j;

	gram_times(G, f, lambda, v, out);
	for (j = 0; j < len; j++)
	{
		const float *y = F + (size_t) idx[j] * f;
		double		t = ((double) conf[j] - 1.0) * dot_fd(y, v, f);

		axpy_fd(t, y, out, f);
	}
}

/*
 * solver_steps steps of conjugate gradient on the row's system, started from
 * the current x (Takacs, Pilaszy, Tikk 2011).  Each step lowers the row's
 * quadratic objective, so the loss cannot rise between sweeps.
 */
AFF_INLINE void
solve_cg(const float *F, const double *G, int f, double lambda,
		 const int32_t *idx, const float *conf, int64_t len, int steps,
		 double *x, double *scratch)
{
	double	   *r = scratch;
	double	   *p = scratch + f;
	double	   *Ap = scratch + 2 * (size_t) f;
	double		rs = 0.0;
	int64_t		j;
	int			k;
	int			step;

	/* r = b - A x = -(G + lambda I) x + sum (c - (c - 1) s) y */
	gram_times(G, f, lambda, x, r);
	for (k = 0; k < f; k++)
		r[k] = -r[k];
	for (j = 0; j < len; j++)
	{
		const float *y = F + (size_t) idx[j] * f;
		double		c = conf[j];
		double		t = c - (c - 1.0) * dot_fd(y, x, f);

		axpy_fd(t, y, r, f);
	}
	for (k = 0; k < f; k++)
		p[k] = r[k];
	rs = dot_dd(r, r, f);
	for (step = 0; step < steps; step++)
	{
		double		pAp = 0.0;
		double		a;
		double		rs_new = 0.0;

		if (rs < 1e-30)
			break;
		row_system_times(F, G, f, lambda, idx, conf, len, p, Ap);
		pAp = dot_dd(p, Ap, f);
		if (!(pAp > 0.0))
			break;
		a = rs / pAp;
#pragma omp simd
		for (k = 0; k < f; k++)
		{
			x[k] += a * p[k];
			r[k] -= a * Ap[k];
		}
		rs_new = dot_dd(r, r, f);
		for (k = 0; k < f; k++)
			p[k] = r[k] + (rs_new / rs) * p[k];
		rs = rs_new;
	}
}

/*
 * Solve one row in place: x (float, f entries) is the warm start for cg
 * and receives the solution.  scratch holds aff_solve_scratch_len(f)
 * doubles.  Returns 0 on a numerical failure (Cholesky only).
 */
AFF_KERNEL static int
solve_row_kernel(const float *F, const double *gram, int f, double lambda,
				 const int32_t *idx, const float *conf, int64_t len, int solver,
				 int solver_steps, float *x, double *scratch)
{
	double	   *xd = scratch + (size_t) f * f + 4 * (size_t) f;
	int			k;
	int			ok = 1;

	for (k = 0; k < f; k++)
		xd[k] = x[k];
	if (solver == AFF_SOLVER_CHOLESKY)
		ok = solve_cholesky(F, gram, f, lambda, idx, conf, len, xd, scratch);
	else
		solve_cg(F, gram, f, lambda, idx, conf, len, solver_steps, xd, scratch);
	if (ok)
		for (k = 0; k < f; k++)
			x[k] = (float) xd[k];
	return ok;
}

/* The entry point of solve_row_kernel. */
int
aff_solve_row(const float *F, const double *gram, int f, double lambda,
			  const int32_t *idx, const float *conf, int64_t len, int solver,
			  int solver_steps, float *x, double *scratch)
{
	return solve_row_kernel(F, gram, f, lambda, idx, conf, len, solver,
							solver_steps, x, scratch);
}

/*
 * The sweep's conjugate gradient, shaped for the memory hierarchy.
 *
 * Rows are taken in blocks of consecutive rows whose interactions together
 * fit a budget (GATHER_BUDGET, at most ROWS_PER_BLOCK rows), so blocks
 * carry similar work whatever the rows' lengths.  A block first copies the
 * fixed-side vector of each of its interactions into one contiguous buffer
 * (one random read per interaction); every cg step then runs on that
 * buffer, which stays in cache, instead of reading each vector from memory
 * again per step.  The products with the Gram matrix, the bulk of the dense
 * work, are one sgemm per step for the whole block (the rows move in
 * lockstep).  A row longer than the budget is a block of its own and reads
 * its vectors in place.
 *
 * The cg vectors and the Gram matrix are single precision (a cg step only
 * lowers the row's objective, it does not need the exact solution); the
 * scalars of each step and the loss are summed in double.  The Cholesky
 * solver stays in double throughout.
 */
#define GATHER_BUDGET 2048		/* the default of AffAlsParams.gather_budget */

/*
 * out += sum_j w_j y_j over a row's interactions, with d_j = y_j . v and
 * w_j = (c_j - 1) d_j (mode 0) or c_j - (c_j - 1) d_j (mode 1: the residual).
 * Y holds the row's gathered vectors (idx NULL) or idx indexes F.  Four
 * interactions at a time, so the four dot products share their reductions.
 */
AFF_INLINE void
cg_interactions(const float *F, const int32_t *idx, const float *Y,
				const float *conf, int64_t len, int f, const float *v,
				float *out, int mode)
{
	int64_t		j = 0;
	int			k;

	for (; j + 4 <= len; j += 4)
	{
		const float *y0 = idx ? F + (size_t) idx[j] * f : Y + (size_t) j * f;
		const float *y1 = idx ? F + (size_t) idx[j + 1] * f : y0 + f;
		const float *y2 = idx ? F + (size_t) idx[j + 2] * f : y1 + f;
		const float *y3 = idx ? F + (size_t) idx[j + 3] * f : y2 + f;
		float		d0 = 0.0f,
					d1 = 0.0f,
					d2 = 0.0f,
					d3 = 0.0f;
		float		w0,
					w1,
					w2,
					w3;

#pragma omp simd reduction(+:d0,d1,d2,d3)
		for (k = 0; k < f; k++)
		{
			d0 += y0[k] * v[k];
			d1 += y1[k] * v[k];
			d2 += y2[k] * v[k];
			d3 += y3[k] * v[k];
		}
		if (mode == 0)
		{
			w0 = (conf[j] - 1.0f) * d0;
			w1 = (conf[j + 1] - 1.0f) * d1;
			w2 = (conf[j + 2] - 1.0f) * d2;
			w3 = (conf[j + 3] - 1.0f) * d3;
		}
		else
		{
			w0 = conf[j] - (conf[j] - 1.0f) * d0;
			w1 = conf[j + 1] - (conf[j + 1] - 1.0f) * d1;
			w2 = conf[j + 2] - (conf[j + 2] - 1.0f) * d2;
			w3 = conf[j + 3] - (conf[j + 3] - 1.0f) * d3;
		}
#pragma omp simd
		for (k = 0; k < f; k++)
			out[k] += w0 * y0[k] + w1 * y1[k] + w2 * y2[k] + w3 * y3[k];
	}
	for (; j < len; j++)
	{
		const float *y = idx ? F + (size_t) idx[j] * f : Y + (size_t) j * f;
		float		d = 0.0f;
		float		w;

#pragma omp simd reduction(+:d)
		for (k = 0; k < f; k++)
			d += y[k] * v[k];
		w = mode == 0 ? (conf[j] - 1.0f) * d : conf[j] - (conf[j] - 1.0f) * d;
#pragma omp simd
		for (k = 0; k < f; k++)
			out[k] += w * y[k];
	}
}

AFF_INLINE double
dot_ff(const float *a, const float *b, int f)
{
	float		s = 0.0f;
	int			k;

#pragma omp simd reduction(+:s)
	for (k = 0; k < f; k++)
		s += a[k] * b[k];
	return s;
}

/*
 * The loss terms of a block's solved rows (see aff_als_sweep): for each
 * row x, x^T G x + sum over its interactions of c (1 - s)^2 - s^2 with
 * s = x . y, and |x|^2 into *sq.  G is the double Gram matrix.
 */
AFF_INLINE double
cg_block_loss(const float *F, const int32_t *idx, const float *Yg,
			  const double *G, int f, const int64_t *ptr, const float *conf,
			  int64_t n, const float *X, double *xd, double *sq)
{
	double		sum = 0.0;
	double		q = 0.0;
	int64_t		i;
	int64_t		j;
	int			a;
	int			k;

	for (i = 0; i < n; i++)
	{
		const float *x = X + (size_t) i * f;

		for (k = 0; k < f; k++)
			xd[k] = x[k];
		for (a = 0; a < f; a++)
			sum += xd[a] * dot_dd(G + (size_t) a * f, xd, f);
		q += dot_dd(xd, xd, f);
		for (j = ptr[i]; j < ptr[i + 1]; j++)
		{
			const float *y = idx ? F + (size_t) idx[j] * f : Yg + (size_t) j * f;
			double		sc = dot_ff(y, x, f);
			double		c = conf[j];

			sum += c * (1.0 - sc) * (1.0 - sc) - sc * sc;
		}
	}
	*sq = q;
	return sum;
}

/*
 * Conjugate gradient for a block of n rows in lockstep: the steps of
 * solve_cg, in single precision, on gathered vectors.  ptr (relative to
 * the block), idx and conf index the rows' interactions; X holds the
 * block's rows (warm start in, solution out).  Yg is the gather buffer
 * (ptr[n] * f floats) or NULL to read F in place.  ws: 4 n f floats;
 * rs: n doubles.  With G not NULL (the double Gram matrix) the block's loss
 * terms are returned and |x|^2 summed into *sq; otherwise 0.
 */
AFF_INLINE double
cg_block(const float *F, const float *Gf, const double *G, int f, float lambda,
		 const int64_t *ptr, const int32_t *idx, const float *conf,
		 int64_t n, int steps, float *X, float *Yg, float *ws, double *rs,
		 double *xd, double *sq)
{
	float	   *r = ws;
	float	   *p = r + (size_t) n * f;
	float	   *ap = p + (size_t) n * f;
	const int32_t *in_place = Yg ? NULL : idx;
	int64_t		i;
	int64_t		j;
	int			k;
	int			step;

	if (Yg != NULL)
		for (j = 0; j < ptr[n]; j++)
			memcpy(Yg + (size_t) j * f, F + (size_t) idx[j] * f, sizeof(float) * f);
	/* r = -(G + lambda I) x + sum (c - (c - 1) s) y */
	cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int) n, f, f, -1.0f,
				X, f, Gf, f, 0.0f, r, f);
	for (i = 0; i < n; i++)
	{
		float	   *ri = r + (size_t) i * f;
		const float *xi = X + (size_t) i * f;

		for (k = 0; k < f; k++)
			ri[k] -= lambda * xi[k];
		cg_interactions(F, in_place ? in_place + ptr[i] : NULL,
						Yg ? Yg + (size_t) ptr[i] * f : NULL,
						conf + ptr[i], ptr[i + 1] - ptr[i], f, xi, ri, 1);
		for (k = 0; k < f; k++)
			p[(size_t) i * f + k] = ri[k];
		rs[i] = dot_ff(ri, ri, f);
	}
	for (step = 0; step < steps; step++)
	{
		cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int) n, f, f, 1.0f,
					p, f, Gf, f, 0.0f, ap, f);
		for (i = 0; i < n; i++)
		{
			float	   *pi = p + (size_t) i * f;
			float	   *api = ap + (size_t) i * f;
			float	   *ri = r + (size_t) i * f;
			float	   *xi = X + (size_t) i * f;
			double		pap;
			float		a;
			float		beta;
			double		rs_new;

			if (rs[i] < 1e-30)
				continue;
			for (k = 0; k < f; k++)
				api[k] += lambda * pi[k];
			cg_interactions(F, in_place ? in_place + ptr[i] : NULL,
							Yg ? Yg + (size_t) ptr[i] * f : NULL,
							conf + ptr[i], ptr[i + 1] - ptr[i], f, pi, api, 0);
			pap = dot_ff(pi, api, f);
			if (!(pap > 0.0))
			{
				rs[i] = 0.0;	/* stop this row */
				continue;
			}
			a = (float) (rs[i] / pap);
#pragma omp simd
			for (k = 0; k < f; k++)
			{
				xi[k] += a * pi[k];
				ri[k] -= a * api[k];
			}
			rs_new = dot_ff(ri, ri, f);
			beta = (float) (rs_new / rs[i]);
			for (k = 0; k < f; k++)
				pi[k] = ri[k] + beta * pi[k];
			rs[i] = rs_new;
		}
	}
	if (G == NULL)
		return 0.0;
	return cg_block_loss(F, in_place, Yg, G, f, ptr, conf, n, X, xd, sq);
}

/* cg_block with f known at compile time for the common sizes. */
AFF_KERNEL static double
solve_cg_block(const float *F, const float *Gf, const double *G, int f, float lambda,
			   const int64_t *ptr, const int32_t *idx, const float *conf,
			   int64_t n, int steps, float *X, float *Yg, float *ws, double *rs,
			   double *xd, double *sq)
{
	switch (f)
	{
		case 32:
			return cg_block(F, Gf, G, 32, lambda, ptr, idx, conf, n, steps, X, Yg, ws, rs, xd, sq);
		case 64:
			return cg_block(F, Gf, G, 64, lambda, ptr, idx, conf, n, steps, X, Yg, ws, rs, xd, sq);
		case 128:
			return cg_block(F, Gf, G, 128, lambda, ptr, idx, conf, n, steps, X, Yg, ws, rs, xd, sq);
		default:
			return cg_block(F, Gf, G, f, lambda, ptr, idx, conf, n, steps, X, Yg, ws, rs, xd, sq);
	}
}

/*
 * cg for one row longer than the gather budget (a popular item, a heavy
 * user).
 * Its vectors do not fit the cache, and reading them in place once per cg
 * step is a random read each time; instead the row's system
 *		A = G + lambda I + sum (c - 1) y y^T,	b = sum c y
 * is formed once, `budget` interactions at a time (gathered, scaled by
 * sqrt(c - 1), one ssyrk each, added into A in double), and the same cg
 * steps then run on A (mathematically the iterates of the matrix-free
 * steps; f x f products instead of passes over the interactions).  The
 * loss terms need no further pass either: over the row's interactions,
 * sum c (1 - s)^2 - s^2 = sum c - 2 x.b + x^T (A - G - lambda I) x.
 * Yg: budget * f floats; Ac: f * f floats; d: f^2 + 5 f doubles.
 * Returns the row's loss terms (x^T G x included) when with_loss.
 */
AFF_KERNEL static double
solve_cg_long_row(const float *F, const double *G, int f, double lambda,
				  const int32_t *idx, const float *conf, int64_t len, int steps,
				  int64_t budget, float *xf, float *Yg, float *Ac, double *d,
				  int with_loss, double *sq)
{
	double	   *A = d;
	double	   *b = A + (size_t) f * f;
	double	   *x = b + f;
	double	   *r = x + f;
	double	   *p = r + f;
	double	   *ap = p + f;
	double		sum_c = 0.0;
	double		rs;
	double		loss = 0.0;
	int64_t		j0;
	int			a;
	int			k;
	int			step;

	for (a = 0; a < f * f; a++)
		A[a] = G[a];
	for (a = 0; a < f; a++)
	{
		A[a * f + a] += lambda;
		b[a] = 0.0;
		x[a] = xf[a];
	}
	for (j0 = 0; j0 < len; j0 += budget)
	{
		int			n = (int) (len - j0 < budget ? len - j0 : budget);
		int			q;

		for (q = 0; q < n; q++)
		{
			const float *y = F + (size_t) idx[j0 + q] * f;
			float		c = conf[j0 + q];
			float		sc = sqrtf(c - 1.0f);
			float	   *z = Yg + (size_t) q * f;

			sum_c += c;
#pragma omp simd
			for (k = 0; k < f; k++)
			{
				z[k] = sc * y[k];
				b[k] += (double) c * y[k];
			}
		}
		cblas_ssyrk(CblasRowMajor, CblasLower, CblasTrans, f, n, 1.0f, Yg, f,
					0.0f, Ac, f);
		for (a = 0; a < f; a++)
			for (k = 0; k <= a; k++)
				A[a * f + k] += Ac[a * f + k];
	}
	for (a = 0; a < f; a++)
		for (k = a + 1; k < f; k++)
			A[a * f + k] = A[k * f + a];

	/* the steps of solve_cg on the formed system */
	gram_times(A, f, 0.0, x, r);
	for (k = 0; k < f; k++)
	{
		r[k] = b[k] - r[k];
		p[k] = r[k];
	}
	rs = dot_dd(r, r, f);
	for (step = 0; step < steps; step++)
	{
		double		pap;
		double		al;
		double		rs_new;

		if (rs < 1e-30)
			break;
		gram_times(A, f, 0.0, p, ap);
		pap = dot_dd(p, ap, f);
		if (!(pap > 0.0))
			break;
		al = rs / pap;
		for (k = 0; k < f; k++)
		{
			x[k] += al * p[k];
			r[k] -= al * ap[k];
		}
		rs_new = dot_dd(r, r, f);
		for (k = 0; k < f; k++)
			p[k] = r[k] + (rs_new / rs) * p[k];
		rs = rs_new;
	}
	for (k = 0; k < f; k++)
		xf[k] = (float) x[k];
	if (!with_loss)
		return 0.0;
	/* x^T A x - lambda |x|^2 - 2 x.b + sum c, with x the stored floats */
	for (k = 0; k < f; k++)
		x[k] = xf[k];
	gram_times(A, f, 0.0, x, ap);
	loss = dot_dd(x, ap, f) - lambda * dot_dd(x, x, f) - 2.0 * dot_dd(x, b, f) + sum_c;
	*sq = dot_dd(x, x, f);
	return loss;
}

/*
 * Cut rows [0, n) into cg blocks (see above): consecutive rows while their
 * interactions fit the budget, at most ROWS_PER_BLOCK rows.  starts gets
 * the first row of each block and n at the end; returns the block count.
 * The blocks depend on the matrix alone, never on the thread count.
 */
static int64_t
cut_blocks(const int64_t *ptr, int64_t n, int64_t budget, int64_t *starts)
{
	int64_t		nb = 0;
	int64_t		r = 0;

	while (r < n)
	{
		int64_t		begin = r;

		starts[nb++] = r;
		r++;
		while (r < n && r - begin < ROWS_PER_BLOCK &&
			   ptr[r + 1] - ptr[begin] <= budget)
			r++;
	}
	starts[nb] = n;
	return nb;
}

/* Longest first, then by block number: a fixed order. */
static int
cmp_long_blocks(const void *a, const void *b)
{
	const int64_t *x = a;
	const int64_t *y = b;

	if (x[0] != y[0])
		return x[0] > y[0] ? -1 : 1;
	return x[1] < y[1] ? -1 : x[1] > y[1];
}

/*
 * The order in which the threads take the blocks: the long rows first,
 * longest first, so that no thread is left with a long row at the end
 * while the others idle; then the others in row order.  pairs: scratch of
 * 2 nb entries.  Which thread takes which block never changes a result.
 */
static void
order_blocks(const int64_t *ptr, const int64_t *starts, int64_t nb, int64_t budget,
			 int64_t *order, int64_t *pairs)
{
	int64_t		n_long = 0;
	int64_t		b;
	int64_t		at;

	for (b = 0; b < nb; b++)
	{
		int64_t		len = ptr[starts[b + 1]] - ptr[starts[b]];

		if (len > budget)
		{
			pairs[2 * n_long] = len;
			pairs[2 * n_long + 1] = b;
			n_long++;
		}
	}
	qsort(pairs, (size_t) n_long, 2 * sizeof(int64_t), cmp_long_blocks);
	for (b = 0; b < n_long; b++)
		order[b] = pairs[2 * b + 1];
	at = n_long;
	for (b = 0; b < nb; b++)
		if (ptr[starts[b + 1]] - ptr[starts[b]] <= budget)
			order[at++] = b;
}

/* One half-sweep: solve rows of `out` against the fixed side `F`. */
typedef struct HalfSweep
{
	AffAls	   *s;
	const float *F;
	float	   *out;
	const int64_t *ptr;
	const int32_t *idx;
	const float *conf;
	const int64_t *starts;		/* cg blocks */
	const int64_t *order;		/* cg blocks in the order they are taken */
	int			with_loss;		/* cg: the loss terms into block_sums */
	atomic_int	failed;
} HalfSweep;

static void
half_sweep_block(void *arg, int thread_no, int64_t block_no, int64_t begin,
				 int64_t end)
{
	HalfSweep  *h = arg;
	AffAls	   *s = h->s;
	int			f = s->p.factors;
	double	   *scratch = s->scratch + (size_t) thread_no * s->scratch_len;
	int64_t		r;

	if (s->p.solver == AFF_SOLVER_CG)
	{
		/* row offsets relative to the block for solve_cg_block */
		int64_t		ptr[ROWS_PER_BLOCK + 1];
		float	   *fs = s->fscratch + (size_t) thread_no * s->fscratch_len;
		float	   *Yg = fs + (size_t) (4 * ROWS_PER_BLOCK > f ? 4 * ROWS_PER_BLOCK : f) * f;
		int64_t		base;
		double		sq = 0.0;
		double		sum;

		block_no = h->order[block_no];
		begin = h->starts[block_no];
		end = h->starts[block_no + 1];
		base = h->ptr[begin];
		if (h->ptr[end] - base > s->budget)
			/* a long row, a block of its own */
			sum = solve_cg_long_row(h->F, s->gram, f, s->p.regularization,
									h->idx + base, h->conf + base, h->ptr[end] - base,
									s->p.solver_steps, s->budget,
									h->out + (size_t) begin * f, Yg, fs, scratch,
									h->with_loss, &sq);
		else
		{
			for (r = begin; r <= end; r++)
				ptr[r - begin] = h->ptr[r] - base;
			sum = solve_cg_block(h->F, s->gram_sym_f, h->with_loss ? s->gram : NULL,
								 f, (float) s->p.regularization, ptr,
								 h->idx + base, h->conf + base, end - begin,
								 s->p.solver_steps, h->out + (size_t) begin * f,
								 Yg, fs, scratch, scratch + ROWS_PER_BLOCK, &sq);
		}
		if (h->with_loss)
		{
			s->block_sums[block_no] = sum;
			s->block_sq[block_no] = sq;
		}
		return;
	}
	(void) block_no;
	for (r = begin; r < end; r++)
	{
		int64_t		lo = h->ptr[r];

		if (!aff_solve_row(h->F, s->gram, f, s->p.regularization,
						   h->idx + lo, h->conf + lo, h->ptr[r + 1] - lo,
						   s->p.solver, s->p.solver_steps,
						   h->out + (size_t) r * f, scratch))
			atomic_store(&h->failed, 1);
	}
}

static AffStatus
half_sweep(AffAls *s, const float *F, float *out, int64_t n_rows,
		   const int64_t *ptr, const int32_t *idx, const float *conf,
		   const int64_t *starts, const int64_t *order, int64_t n_blocks, int with_loss,
		   AffPollFn poll, void *poll_arg, AffError *err)
{
	HalfSweep	h;
	AffStatus	st;
	int			f = s->p.factors;
	int			a;
	int			b;

	h.s = s;
	h.F = F;
	h.out = out;
	h.ptr = ptr;
	h.idx = idx;
	h.conf = conf;
	h.starts = starts;
	h.order = order;
	h.with_loss = with_loss;
	atomic_init(&h.failed, 0);
	if (s->p.solver == AFF_SOLVER_CG)
	{
		/* the Gram matrix, full and in single precision, for sgemm */
		for (a = 0; a < f; a++)
			for (b = 0; b < f; b++)
				s->gram_sym_f[a * f + b] = (float) s->gram[a * f + b];
		st = aff_parallel_for(s->p.threads, n_blocks, 1,
							  half_sweep_block, &h, poll, poll_arg, err);
	}
	else
		st = aff_parallel_for(s->p.threads, n_rows, ROWS_PER_BLOCK,
							  half_sweep_block, &h, poll, poll_arg, err);
	if (st != AFF_OK)
		return st;
	if (atomic_load(&h.failed))
	{
		aff_fail(err, AFF_ERR_NUMERIC, "a least-squares system is not positive definite");
		return aff_detail(err, "Regularization %g is too small for this data.",
						  s->p.regularization);
	}
	return AFF_OK;
}

/* Per-block loss terms of the user rows against the current Y and Y^T Y. */
AFF_KERNEL static void
loss_block(void *arg, int thread_no, int64_t block_no, int64_t begin,
		   int64_t end)
{
	AffAls	   *s = arg;
	const AffMatrix *m = s->m;
	int			f = s->p.factors;
	double	   *xd = s->scratch + (size_t) thread_no * s->scratch_len;
	double	   *gx = xd + f;
	double		sum = 0.0;
	int64_t		u;
	int64_t		j;
	int			k;

	for (u = begin; u < end; u++)
	{
		const float *x = s->X + (size_t) u * f;

		for (k = 0; k < f; k++)
			xd[k] = x[k];
		gram_times(s->gram, f, 0.0, xd, gx);
		for (k = 0; k < f; k++)
			sum += xd[k] * gx[k];
		for (j = m->row_ptr[u]; j < m->row_ptr[u + 1]; j++)
		{
			double		sc = dot_fd(s->Y + (size_t) m->row_idx[j] * f, xd, f);
			double		c = s->row_conf[j];

			sum += c * (1.0 - sc) * (1.0 - sc) - sc * sc;
		}
	}
	s->block_sums[block_no] = sum;
}

static double
trace(const double *G, int f)
{
	double		t = 0.0;
	int			k;

	for (k = 0; k < f; k++)
		t += G[k * f + k];
	return t;
}

/* splitmix64: a small, well-mixed generator for the initial factors */
static uint64_t
splitmix64(uint64_t *state)
{
	uint64_t	z = (*state += 0x9e3779b97f4a7c15ULL);

	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
	z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
	return z ^ (z >> 31);
}

/*
 * Fill v[2 q_begin .. min(2 q_end, n)) with normal deviates of standard
 * deviation sd (Box-Muller), pair q from draws 2q + 1 and 2q + 2 of
 * splitmix64 started at s0.  splitmix64 steps its state by a constant, so
 * the k-th draw is the mix of s0 + k * step: any range of pairs can be
 * filled on its own, and the values do not depend on how the pairs are
 * shared out.
 */
static void
fill_normal_pairs(float *v, size_t n, double sd, uint64_t s0, size_t q_begin,
				  size_t q_end)
{
	size_t		q;

	for (q = q_begin; q < q_end; q++)
	{
		uint64_t	state = s0 + (uint64_t) (2 * q) * 0x9e3779b97f4a7c15ULL;
		double		u1 = ((splitmix64(&state) >> 11) + 1.0) * (1.0 / 9007199254740993.0);
		double		u2 = (splitmix64(&state) >> 11) * (1.0 / 9007199254740992.0);
		double		rad = sqrt(-2.0 * log(u1));
		size_t		i = 2 * q;

		v[i] = (float) (sd * rad * cos(2.0 * M_PI * u2));
		if (i + 1 < n)
			v[i + 1] = (float) (sd * rad * sin(2.0 * M_PI * u2));
	}
}

/* The initial factors, in blocks of pairs on the fit's threads. */
typedef struct InitJob
{
	AffAls	   *s;
	uint64_t	seed_x;			/* splitmix64 state where X's draws start */
	int64_t		y_pairs;		/* pairs of Y, then of X */
	int64_t		x_pairs;
} InitJob;

static void
init_block(void *arg, int thread_no, int64_t block_no, int64_t begin, int64_t end)
{
	InitJob    *j = arg;
	AffAls	   *s = j->s;
	const AffMatrix *m = s->m;
	size_t		ny = (size_t) m->n_items * s->p.factors;
	size_t		nx = (size_t) m->n_users * s->p.factors;
	int64_t		q;

	(void) thread_no;
	(void) block_no;
	for (q = begin; q < end;)
	{
		if (q < j->y_pairs)
		{
			int64_t		e = end < j->y_pairs ? end : j->y_pairs;

			fill_normal_pairs(s->Y, ny, 0.01, s->p.seed, (size_t) q, (size_t) e);
			q = e;
		}
		else
		{
			int64_t		e = end < j->y_pairs + j->x_pairs ? end : j->y_pairs + j->x_pairs;

			fill_normal_pairs(s->X, nx, 0.01, j->seed_x, (size_t) (q - j->y_pairs),
							  (size_t) (e - j->y_pairs));
			q = e;
		}
	}
}

/* Confidences of interactions [begin, end), both orders. */
static void
conf_block(void *arg, int thread_no, int64_t block_no, int64_t begin, int64_t end)
{
	AffAls	   *s = arg;
	const AffMatrix *m = s->m;
	int64_t		k;

	(void) thread_no;
	(void) block_no;
	for (k = begin; k < end; k++)
	{
		s->row_conf[k] = (float) aff_confidence(s->p.confidence, s->p.alpha,
												s->p.epsilon, m->row_val[k]);
		s->col_conf[k] = (float) aff_confidence(s->p.confidence, s->p.alpha,
												s->p.epsilon, m->col_val[k]);
	}
}

/*
 * Prepare a fit: allocate factors and scratch, draw the initial factors
 * from the seed, precompute confidences.
 */
AffStatus
aff_als_init(AffAls *s, const AffMatrix *m, const AffAlsParams *p,
			 const AffAllocator *a, AffError *err)
{
	int			f = p->factors;
	size_t		nx;
	size_t		ny;

	memset(s, 0, sizeof(*s));
	s->m = m;
	s->p = *p;
	if (aff_mul_overflows((size_t) m->n_users, (size_t) f, &nx) ||
		aff_mul_overflows((size_t) m->n_items, (size_t) f, &ny))
		return aff_fail(err, AFF_ERR_LIMIT, "factor matrices are too large");
	s->scratch_len = aff_solve_scratch_len(f);
	/* the blocked conjugate gradient needs more */
	if (s->scratch_len < (size_t) (4 * f + 1) * ROWS_PER_BLOCK + (size_t) ROWS_PER_BLOCK)
		s->scratch_len = (size_t) (4 * f + 1) * ROWS_PER_BLOCK + (size_t) ROWS_PER_BLOCK;
	s->max_blocks = (m->n_users > m->n_items ? m->n_users : m->n_items) / ROWS_PER_BLOCK + 1;
	/* cg vectors of a block (or a long row's f x f chunk sum), then the gather buffer */
	s->budget = p->gather_budget > 0 ? p->gather_budget : GATHER_BUDGET;
	s->fscratch_len = ((size_t) (4 * ROWS_PER_BLOCK > f ? 4 * ROWS_PER_BLOCK : f) +
					   (size_t) s->budget) * (size_t) f;
	s->fscratch = aff_alloc_array(a, s->fscratch_len * (size_t) p->threads, sizeof(float));
	s->gram_sym_f = aff_alloc_array(a, (size_t) f * f, sizeof(float));
	s->user_starts = aff_alloc_array(a, (size_t) m->n_users + 1, sizeof(int64_t));
	s->item_starts = aff_alloc_array(a, (size_t) m->n_items + 1, sizeof(int64_t));
	s->user_order = aff_alloc_array(a, (size_t) m->n_users + 1, sizeof(int64_t));
	s->item_order = aff_alloc_array(a, (size_t) m->n_items + 1, sizeof(int64_t));
	if (s->user_starts && s->item_starts && s->user_order && s->item_order)
	{
		int64_t		nmax = m->n_users > m->n_items ? m->n_users : m->n_items;
		int64_t    *pairs = aff_alloc_array(a, 2 * (size_t) nmax + 2, sizeof(int64_t));

		s->n_user_blocks = cut_blocks(m->row_ptr, m->n_users, s->budget, s->user_starts);
		s->n_item_blocks = cut_blocks(m->col_ptr, m->n_items, s->budget, s->item_starts);
		if (s->n_item_blocks > s->max_blocks)
			s->max_blocks = s->n_item_blocks;
		if (pairs != NULL)
		{
			order_blocks(m->row_ptr, s->user_starts, s->n_user_blocks, s->budget,
						 s->user_order, pairs);
			order_blocks(m->col_ptr, s->item_starts, s->n_item_blocks, s->budget,
						 s->item_order, pairs);
			aff_release(a, pairs);
		}
		else
		{
			aff_release(a, s->user_order);
			s->user_order = NULL;	/* reported below */
		}
	}
	s->X = aff_alloc_array(a, nx, sizeof(float));
	s->Y = aff_alloc_array(a, ny, sizeof(float));
	s->row_conf = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	s->col_conf = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	s->gram_f = aff_alloc_array(a, (size_t) f * f, sizeof(float));
	s->gram = aff_alloc_array(a, (size_t) f * f, sizeof(double));
	s->scratch = aff_alloc_array(a, s->scratch_len * (size_t) p->threads, sizeof(double));
	s->block_sums = aff_alloc_array(a, (size_t) s->max_blocks, sizeof(double));
	s->block_sq = aff_alloc_array(a, (size_t) s->max_blocks, sizeof(double));
	if (!s->X || !s->Y || !s->row_conf || !s->col_conf || !s->gram_f ||
		!s->gram || !s->scratch || !s->block_sums || !s->block_sq ||
		!s->fscratch || !s->gram_sym_f || !s->user_starts || !s->item_starts ||
		!s->user_order || !s->item_order)
	{
		aff_als_free(s, a);
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the factor matrices");
	}
	/*
	 * Item factors first, then user factors: a fixed order of the seed's
	 * draws (two a pair of values), whatever the thread count.
	 */
	{
		InitJob		job;
		int64_t		units;

		job.s = s;
		job.y_pairs = (int64_t) ((ny + 1) / 2);
		job.x_pairs = (int64_t) ((nx + 1) / 2);
		job.seed_x = p->seed + (uint64_t) (2 * job.y_pairs) * 0x9e3779b97f4a7c15ULL;
		units = job.y_pairs + job.x_pairs;
		if (aff_parallel_for(p->threads, units, 8192, init_block, &job, NULL, NULL, err) != AFF_OK ||
			aff_parallel_for(p->threads, m->nnz, 65536, conf_block, s, NULL, NULL, err) != AFF_OK)
		{
			aff_als_free(s, a);
			return err->status;
		}
	}
	return AFF_OK;
}

/*
 * One sweep: users given items, then items given users; then the loss of
 * the new factors, returned in *loss.
 */
AffStatus
aff_als_sweep(AffAls *s, double *loss, AffPollFn poll, void *poll_arg,
			  AffError *err)
{
	const AffMatrix *m = s->m;
	int			f = s->p.factors;
	int			cg = s->p.solver == AFF_SOLVER_CG;
	int64_t		nb;
	int64_t		b;
	double		total;
	double		trace_y;
	AffStatus	st;

	if (!s->gram_is_y)
		aff_gram(s->Y, m->n_items, f, s->p.threads, s->gram_f, s->gram);
	st = half_sweep(s, s->Y, s->X, m->n_users, m->row_ptr, m->row_idx,
					s->row_conf, s->user_starts, s->user_order, s->n_user_blocks, 0,
					poll, poll_arg, err);
	if (st != AFF_OK)
		return st;

	aff_gram(s->X, m->n_users, f, s->p.threads, s->gram_f, s->gram);
	s->trace_x = trace(s->gram, f);
	s->gram_is_y = 0;
	/* cg: the item blocks also sum the loss terms (by items, with X^T X) */
	st = half_sweep(s, s->X, s->Y, m->n_items, m->col_ptr, m->col_idx,
					s->col_conf, s->item_starts, s->item_order, s->n_item_blocks, cg,
					poll, poll_arg, err);
	if (st != AFF_OK)
		return st;

	total = 0.0;
	if (cg)
	{
		/*
		 * The loss by items: sum_u x_u^T (Y^T Y) x_u = sum_i y_i^T (X^T X) y_i,
		 * so the item blocks sum it while their gathered user vectors are
		 * still in cache; the next sweep computes Y^T Y.
		 */
		trace_y = 0.0;
		for (b = 0; b < s->n_item_blocks; b++)
		{
			total += s->block_sums[b];
			trace_y += s->block_sq[b];
		}
	}
	else
	{
		/* loss of (X, Y): needs Y^T Y, which the next sweep reuses */
		aff_gram(s->Y, m->n_items, f, s->p.threads, s->gram_f, s->gram);
		s->gram_is_y = 1;
		st = aff_parallel_for(s->p.threads, m->n_users, ROWS_PER_BLOCK,
							  loss_block, s, poll, poll_arg, err);
		if (st != AFF_OK)
			return st;
		nb = (m->n_users + ROWS_PER_BLOCK - 1) / ROWS_PER_BLOCK;
		for (b = 0; b < nb; b++)
			total += s->block_sums[b];
		trace_y = trace(s->gram, f);
	}
	total += s->p.regularization * (s->trace_x + trace_y);
	*loss = total;
	return AFF_OK;
}

void
aff_als_free(AffAls *s, const AffAllocator *a)
{
	aff_release(a, s->X);
	aff_release(a, s->Y);
	aff_release(a, s->row_conf);
	aff_release(a, s->col_conf);
	aff_release(a, s->gram_f);
	aff_release(a, s->gram);
	aff_release(a, s->scratch);
	aff_release(a, s->block_sums);
	aff_release(a, s->block_sq);
	aff_release(a, s->fscratch);
	aff_release(a, s->gram_sym_f);
	aff_release(a, s->user_starts);
	aff_release(a, s->item_starts);
	aff_release(a, s->user_order);
	aff_release(a, s->item_order);
	memset(s, 0, sizeof(*s));
}
