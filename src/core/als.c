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
 * Rows are solved in double precision in blocks by aff_parallel_for; each
 * row's result depends only on its inputs, and per-block sums are added in
 * block order, so the model does not depend on which thread did what.
 */
#include "als.h"
#include "parallel.h"

#include <cblas.h>
#include <math.h>
#include <stdatomic.h>
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
 * Conjugate gradient for a block of rows in lockstep, so that the products
 * with the shared Gram matrix, the bulk of the dense work, become one
 * matrix product per step (dgemm, BLAS-3) instead of a matrix-vector
 * product per row.  The steps are those of solve_cg; a row that has
 * converged (or meets a non-positive curvature) stops moving while the
 * others go on.  ptr/idx/conf index the rows' interactions, X holds the
 * block's rows (warm start in, solution out).  scratch: 5 * n * f doubles.
 */
AFF_KERNEL static void
solve_cg_block(const float *F, const double *G, int f, double lambda,
			   const int64_t *ptr, const int32_t *idx, const float *conf,
			   int64_t n, int steps, float *X, double *scratch)
{
	double	   *x = scratch;
	double	   *r = x + (size_t) n * f;
	double	   *p = r + (size_t) n * f;
	double	   *ap = p + (size_t) n * f;
	double	   *rs = ap + (size_t) n * f;	/* n entries */
	int64_t		i;
	int64_t		j;
	int			k;
	int			step;

	for (i = 0; i < (int64_t) n * f; i++)
		x[i] = X[i];
	/* r = -(G + lambda I) x + sum (c - (c - 1) s) y */
	cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int) n, f, f, -1.0,
				x, f, G, f, 0.0, r, f);
	for (i = 0; i < n; i++)
	{
		double	   *ri = r + (size_t) i * f;
		double	   *xi = x + (size_t) i * f;

		for (k = 0; k < f; k++)
			ri[k] -= lambda * xi[k];
		for (j = ptr[i]; j < ptr[i + 1]; j++)
		{
			const float *y = F + (size_t) idx[j] * f;
			double		c = conf[j];

			axpy_fd(c - (c - 1.0) * dot_fd(y, xi, f), y, ri, f);
		}
		for (k = 0; k < f; k++)
			p[(size_t) i * f + k] = ri[k];
		rs[i] = dot_dd(ri, ri, f);
	}
	for (step = 0; step < steps; step++)
	{
		cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int) n, f, f, 1.0,
					p, f, G, f, 0.0, ap, f);
		for (i = 0; i < n; i++)
		{
			double	   *pi = p + (size_t) i * f;
			double	   *api = ap + (size_t) i * f;
			double	   *ri = r + (size_t) i * f;
			double	   *xi = x + (size_t) i * f;
			double		pap;
			double		a;
			double		rs_new;

			if (rs[i] < 1e-30)
				continue;
			for (k = 0; k < f; k++)
				api[k] += lambda * pi[k];
			for (j = ptr[i]; j < ptr[i + 1]; j++)
			{
				const float *y = F + (size_t) idx[j] * f;

				axpy_fd(((double) conf[j] - 1.0) * dot_fd(y, pi, f), y, api, f);
			}
			pap = dot_dd(pi, api, f);
			if (!(pap > 0.0))
			{
				rs[i] = 0.0;	/* stop this row */
				continue;
			}
			a = rs[i] / pap;
#pragma omp simd
			for (k = 0; k < f; k++)
			{
				xi[k] += a * pi[k];
				ri[k] -= a * api[k];
			}
			rs_new = dot_dd(ri, ri, f);
			for (k = 0; k < f; k++)
				pi[k] = ri[k] + (rs_new / rs[i]) * pi[k];
			rs[i] = rs_new;
		}
	}
	for (i = 0; i < (int64_t) n * f; i++)
		X[i] = (float) x[i];
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

	(void) block_no;
	if (s->p.solver == AFF_SOLVER_CG)
	{
		/* row offsets relative to the block for solve_cg_block */
		int64_t		ptr[ROWS_PER_BLOCK + 1];
		int64_t		base = h->ptr[begin];

		for (r = begin; r <= end; r++)
			ptr[r - begin] = h->ptr[r] - base;
		solve_cg_block(h->F, s->gram, f, s->p.regularization, ptr,
					   h->idx + base, h->conf + base, end - begin, s->p.solver_steps,
					   h->out + (size_t) begin * f, scratch);
		return;
	}
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
		   AffPollFn poll, void *poll_arg, AffError *err)
{
	HalfSweep	h;
	AffStatus	st;

	h.s = s;
	h.F = F;
	h.out = out;
	h.ptr = ptr;
	h.idx = idx;
	h.conf = conf;
	atomic_init(&h.failed, 0);
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

/* Fill v with n normal deviates of standard deviation sd (Box-Muller). */
static void
fill_normal(float *v, size_t n, double sd, uint64_t *state)
{
	size_t		i;

	for (i = 0; i < n; i += 2)
	{
		double		u1 = ((splitmix64(state) >> 11) + 1.0) * (1.0 / 9007199254740993.0);
		double		u2 = (splitmix64(state) >> 11) * (1.0 / 9007199254740992.0);
		double		rad = sqrt(-2.0 * log(u1));

		v[i] = (float) (sd * rad * cos(2.0 * M_PI * u2));
		if (i + 1 < n)
			v[i + 1] = (float) (sd * rad * sin(2.0 * M_PI * u2));
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
	uint64_t	state = p->seed;
	int64_t		j;
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
	s->X = aff_alloc_array(a, nx, sizeof(float));
	s->Y = aff_alloc_array(a, ny, sizeof(float));
	s->row_conf = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	s->col_conf = aff_alloc_array(a, (size_t) m->nnz, sizeof(float));
	s->gram_f = aff_alloc_array(a, (size_t) f * f, sizeof(float));
	s->gram = aff_alloc_array(a, (size_t) f * f, sizeof(double));
	s->scratch = aff_alloc_array(a, s->scratch_len * (size_t) p->threads, sizeof(double));
	s->block_sums = aff_alloc_array(a, (size_t) s->max_blocks, sizeof(double));
	if (!s->X || !s->Y || !s->row_conf || !s->col_conf || !s->gram_f ||
		!s->gram || !s->scratch || !s->block_sums)
	{
		aff_als_free(s, a);
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the factor matrices");
	}
	/* item factors first, then user factors: a fixed order for the seed */
	fill_normal(s->Y, ny, 0.01, &state);
	fill_normal(s->X, nx, 0.01, &state);
	for (j = 0; j < m->nnz; j++)
	{
		s->row_conf[j] = (float) aff_confidence(p->confidence, p->alpha, p->epsilon, m->row_val[j]);
		s->col_conf[j] = (float) aff_confidence(p->confidence, p->alpha, p->epsilon, m->col_val[j]);
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
	int64_t		nb;
	int64_t		b;
	double		total;
	AffStatus	st;

	if (!s->gram_is_y)
		aff_gram(s->Y, m->n_items, f, s->p.threads, s->gram_f, s->gram);
	st = half_sweep(s, s->Y, s->X, m->n_users, m->row_ptr, m->row_idx,
					s->row_conf, poll, poll_arg, err);
	if (st != AFF_OK)
		return st;

	aff_gram(s->X, m->n_users, f, s->p.threads, s->gram_f, s->gram);
	s->trace_x = trace(s->gram, f);
	s->gram_is_y = 0;
	st = half_sweep(s, s->X, s->Y, m->n_items, m->col_ptr, m->col_idx,
					s->col_conf, poll, poll_arg, err);
	if (st != AFF_OK)
		return st;

	/* loss of (X, Y): needs Y^T Y, which the next sweep reuses */
	aff_gram(s->Y, m->n_items, f, s->p.threads, s->gram_f, s->gram);
	s->gram_is_y = 1;
	st = aff_parallel_for(s->p.threads, m->n_users, ROWS_PER_BLOCK,
						  loss_block, s, poll, poll_arg, err);
	if (st != AFF_OK)
		return st;
	nb = (m->n_users + ROWS_PER_BLOCK - 1) / ROWS_PER_BLOCK;
	total = 0.0;
	for (b = 0; b < nb; b++)
		total += s->block_sums[b];
	total += s->p.regularization * (s->trace_x + trace(s->gram, f));
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
	memset(s, 0, sizeof(*s));
}
