/*
 * method_content.c
 *		content as a method: content-based filtering over item profiles.
 *		Each customer's preference vector in feature space (the customer's
 *		"user profile") is a ridge regression of the customer's
 *		confidence-weighted preferences on the item profiles, and an item's
 *		score is its profile times that vector.  Items nobody bought yet
 *		score like any other, from their content alone.
 *
 * Content-based filtering: Lops, de Gemmis, Semeraro 2011, "Content-based
 * Recommender Systems: State of the Art and Trends" (Recommender Systems
 * Handbook, ch. 3).  The weighting is that of Hu, Koren, Volinsky 2008
 * ("Collaborative Filtering for Implicit Feedback Datasets"): preference
 * p_ui = 1 on the items u bought and 0 on every other item of the
 * catalogue, confidence c_ui = 1 + alpha f(w_ui) on bought items and 1
 * elsewhere, with the fit's confidence option choosing f.  With Q the
 * catalogue's item x feature matrix (n items, F features, as the profiles
 * value stores it after normalisation) user u's vector is
 *
 *     x_u = argmin  sum_i c_ui (p_ui - q_i . x)^2 + lambda |x|^2
 *         = (Q^T C_u Q + lambda I)^-1 Q^T C_u p_u,
 *
 * the closed form of implicit ALS with the item factors fixed to Q.
 * Q^T C_u Q = G + Q_u^T D_u Q_u with G = Q^T Q shared by every user and
 * D_u = diag(c_uj - 1) over the n_u items u bought.
 *
 * The per-user solve.  M = G + lambda I is factored and inverted once
 * (Cholesky, F x F, in double).  For a user with n_u <= F, the Woodbury
 * identity gives x_u from M^-1 without an F x F factorisation:
 *
 *     Z = M^-1 Q_u^T,  x0 = Z c,  E = D_u^(1/2),
 *     x_u = x0 - Z E (I + E Q_u Z E)^-1 E Q_u x0,
 *
 * an n_u x n_u Cholesky.  Its cost is F x nnz(Q_u) for Z on feature rows
 * (F^2 n_u on dense vectors), n_u x nnz(Q_u) for Q_u Z and n_u^3 / 3; a
 * user with n_u > F is solved directly: A = M + Q_u^T D_u Q_u, Cholesky,
 * F^3 / 3.  So a user costs at most O(F nnz(Q_u) + min(n_u, F)^3), and the
 * fit O(F^3 + sum_u that), with M^-1 (8 F^2 bytes) shared and 8 (F k + k^2)
 * bytes of scratch per thread, k = min(largest n_u, F) (8 F^2 more when
 * some n_u > F).  Users run in blocks on worker threads (engine code only;
 * single-threaded LAPACK on each).
 *
 * Serving: scores q_i . x_u; a basket is solved by conjugate gradients on
 * the same system (products with Q^T Q through Q, never forming G), as are
 * the contributions of a user's items to a score (c_uj q_j^T A_u^-1 q_i,
 * section 5 of Hu et al.); items like an item are the content cosine of
 * item_profiles.
 */
#include "method.h"
#include "profiles.h"
#include "parallel.h"
#include "als.h"

#include <cblas.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

/* LAPACK through OpenBLAS (Fortran interface: hidden string lengths last) */
extern void dpotrf_(const char *uplo, const int *n, double *a, const int *lda,
					int *info, size_t uplo_len);
extern void dpotrs_(const char *uplo, const int *n, const int *nrhs, const double *a,
					const int *lda, double *b, const int *ldb, int *info, size_t uplo_len);
extern void dpotri_(const char *uplo, const int *n, double *a, const int *lda,
					int *info, size_t uplo_len);

#define USER_BLOCK 16

/* The item x feature matrix as a profiles value (or a content model) holds it. */
typedef struct Prof
{
	int64_t		n;				/* items */
	int			F;				/* features or dimension */
	int			dense;
	const int64_t *ptr;			/* feature rows: CSR */
	const int32_t *fi;
	const float *fv;
	const float *X;				/* dense: n x F */
} Prof;

static void
prof_of(const void *const *sec, int64_t n_items, Prof *p)
{
	const int64_t *info = sec[AFF_SEC_PROFILE_INFO];

	p->n = n_items;
	p->F = (int) info[AFF_PINFO_FEATURES];
	p->dense = info[AFF_PINFO_KIND] == AFF_PROFILE_DENSE;
	p->ptr = sec[AFF_SEC_PROFILE_PTR];
	p->fi = sec[AFF_SEC_PROFILE_FEATURES];
	p->fv = sec[AFF_SEC_PROFILE_VALUES];
	p->X = sec[AFF_SEC_PROFILE_VECTORS];
}

/* q_i . v in double */
static inline double
row_dot(const Prof *p, int64_t i, const double *v)
{
	double		s = 0;
	int64_t		j;

	if (p->dense)
	{
		const float *q = p->X + (size_t) i * p->F;
		int			d;

		for (d = 0; d < p->F; d++)
			s += (double) q[d] * v[d];
		return s;
	}
	for (j = p->ptr[i]; j < p->ptr[i + 1]; j++)
		s += (double) p->fv[j] * v[p->fi[j]];
	return s;
}

/* q_i . x for a float vector x, in double */
static inline double
row_dot_f(const Prof *p, int64_t i, const float *x)
{
	double		s = 0;
	int64_t		j;

	if (p->dense)
	{
		const float *q = p->X + (size_t) i * p->F;
		int			d;

		for (d = 0; d < p->F; d++)
			s += (double) q[d] * x[d];
		return s;
	}
	for (j = p->ptr[i]; j < p->ptr[i + 1]; j++)
		s += (double) p->fv[j] * x[p->fi[j]];
	return s;
}

/* out += a q_i */
static inline void
row_axpy(const Prof *p, int64_t i, double a, double *out)
{
	int64_t		j;

	if (p->dense)
	{
		const float *q = p->X + (size_t) i * p->F;
		int			d;

		for (d = 0; d < p->F; d++)
			out[d] += a * q[d];
		return;
	}
	for (j = p->ptr[i]; j < p->ptr[i + 1]; j++)
		out[p->fi[j]] += a * p->fv[j];
}

/* z = Minv q_i (Minv symmetric F x F, row-major) */
static void
minv_row(const Prof *p, const double *Minv, int64_t i, double *z, double *tmp)
{
	int			F = p->F;
	int64_t		j;

	if (p->dense)
	{
		const float *q = p->X + (size_t) i * F;
		int			d;

		for (d = 0; d < F; d++)
			tmp[d] = q[d];
		cblas_dsymv(CblasRowMajor, CblasUpper, F, 1.0, Minv, F, tmp, 1, 0.0, z, 1);
		return;
	}
	memset(z, 0, sizeof(double) * F);
	for (j = p->ptr[i]; j < p->ptr[i + 1]; j++)
		cblas_daxpy(F, (double) p->fv[j], Minv + (size_t) p->fi[j] * F, 1, z, 1);
}

/*
 * The fit's shared state: the profiles, the options, M^-1 (and M when some
 * user needs the direct solve), the users' output, scratch per thread.
 */
typedef struct ContentFit
{
	const AffMatrix *m;
	const AffOptions *o;
	Prof		P;
	const double *Minv;
	const double *M;			/* NULL unless some n_u > F */
	int			k;				/* min(largest n_u, F) */
	int64_t		max_n;			/* largest n_u */
	double	  **scratch;		/* per thread */
	int64_t    *bad_user;		/* per thread: first user whose solve failed, or -1 */
	float	   *X;				/* n_users x F */
} ContentFit;


/* A thread's scratch, carved from one block of scratch_len doubles. */
typedef struct Scratch
{
	double	   *Z;				/* k x F */
	double	   *T;				/* k x k */
	double	   *b;				/* F */
	double	   *tmp;			/* F */
	double	   *x;				/* F */
	double	   *e;				/* k */
	double	   *t;				/* k */
	double	   *conf;			/* max_n */
	double	   *A;				/* F x F, when direct */
} Scratch;

static size_t
scratch_len(int F, int k, int64_t max_n, int direct)
{
	return (size_t) F * k + (size_t) k * k + 3 * (size_t) F + 2 * (size_t) k +
		(size_t) max_n + (direct ? (size_t) F * F : 0);
}

static void
scratch_carve(double *base, int F, int k, int64_t max_n, int direct, Scratch *s)
{
	s->Z = base;
	s->T = s->Z + (size_t) F * k;
	s->b = s->T + (size_t) k * k;
	s->tmp = s->b + F;
	s->x = s->tmp + F;
	s->e = s->x + F;
	s->t = s->e + k;
	s->conf = s->t + k;
	s->A = direct ? s->conf + max_n : NULL;
}

/*
 * x (F doubles in s->x) for the n items idx with confidences conf: the
 * Woodbury form when n <= F, else the direct one (s->A must exist).  False
 * when a system is not positive definite.
 */
static int
solve_one(const Prof *P, const double *Minv, const double *M, const int32_t *idx,
		  const double *conf, int64_t n, const Scratch *s)
{
	int			F = P->F;
	double	   *x = s->x;
	int64_t		j;
	int64_t		l;
	int			info;
	int			one = 1;

	if (n <= F)
	{
		int			nn = (int) n;

		memset(x, 0, sizeof(double) * F);
		if (n == 0)
			return 1;
		for (j = 0; j < n; j++)
		{
			minv_row(P, Minv, idx[j], s->Z + (size_t) j * F, s->tmp);
			cblas_daxpy(F, conf[j], s->Z + (size_t) j * F, 1, x, 1);	/* x0 = M^-1 b */
			s->e[j] = conf[j] > 1.0 ? sqrt(conf[j] - 1.0) : 0.0;
		}
		/* T = I + E Q_u Z E (lower triangle), t = E Q_u x0 */
		for (l = 0; l < n; l++)
		{
			s->t[l] = s->e[l] * row_dot(P, idx[l], x);
			for (j = 0; j <= l; j++)
				s->T[(size_t) l * n + j] = s->e[l] * s->e[j] *
					row_dot(P, idx[l], s->Z + (size_t) j * F) + (l == j ? 1.0 : 0.0);
		}
		/* the row-major lower triangle is the column-major upper one */
		dpotrf_("U", &nn, s->T, &nn, &info, 1);
		if (info != 0)
			return 0;
		dpotrs_("U", &nn, &one, s->T, &nn, s->t, &nn, &info, 1);
		if (info != 0)
			return 0;
		for (j = 0; j < n; j++)
			cblas_daxpy(F, -s->e[j] * s->t[j], s->Z + (size_t) j * F, 1, x, 1);
		return 1;
	}
	/* direct: A = M + sum d_j q_j q_j^T (row-major upper), b = sum c_j q_j */
	AFF_ASSERT(s->A != NULL && M != NULL);
	memcpy(s->A, M, sizeof(double) * F * F);
	memset(s->b, 0, sizeof(double) * F);
	for (j = 0; j < n; j++)
	{
		double		d = conf[j] - 1.0;

		row_axpy(P, idx[j], conf[j], s->b);
		if (d <= 0)
			continue;
		if (P->dense)
		{
			const float *q = P->X + (size_t) idx[j] * F;
			int			r;

			for (r = 0; r < F; r++)
				s->tmp[r] = q[r];
			cblas_dsyr(CblasRowMajor, CblasUpper, F, d, s->tmp, 1, s->A, F);
		}
		else
		{
			int64_t		a;
			int64_t		c;
			int64_t		hi = P->ptr[idx[j] + 1];

			for (a = P->ptr[idx[j]]; a < hi; a++)
				for (c = a; c < hi; c++)
					s->A[(size_t) P->fi[a] * F + P->fi[c]] += d * P->fv[a] * P->fv[c];
		}
	}
	/* the row-major upper triangle is the column-major lower one */
	dpotrf_("L", &F, s->A, &F, &info, 1);
	if (info != 0)
		return 0;
	memcpy(x, s->b, sizeof(double) * F);
	dpotrs_("L", &F, &one, s->A, &F, x, &F, &info, 1);
	return info == 0;
}

/* Worker: the users of [begin, end). */
static void
fit_users(void *arg, int thread_no, int64_t block_no, int64_t begin, int64_t end)
{
	const ContentFit *cf = arg;
	const AffMatrix *m = cf->m;
	const AffOptions *o = cf->o;
	int			F = cf->P.F;
	Scratch		s;
	int64_t		u;
	int64_t		j;
	int			d;

	(void) block_no;
	scratch_carve(cf->scratch[thread_no], F, cf->k, cf->max_n, cf->M != NULL, &s);
	for (u = begin; u < end; u++)
	{
		int64_t		lo = m->row_ptr[u];
		int64_t		n = m->row_ptr[u + 1] - lo;
		int			ok;

		for (j = 0; j < n; j++)
			s.conf[j] = aff_confidence(o->confidence, o->alpha, o->epsilon, m->row_val[lo + j]);
		ok = solve_one(&cf->P, cf->Minv, cf->M, m->row_idx + lo, s.conf, n, &s);
		for (d = 0; d < F && ok; d++)
			ok = isfinite((float) s.x[d]);
		if (!ok)
		{
			if (cf->bad_user[thread_no] < 0)
				cf->bad_user[thread_no] = u;
			memset(cf->X + (size_t) u * F, 0, sizeof(float) * F);
			continue;
		}
		for (d = 0; d < F; d++)
			cf->X[(size_t) u * F + d] = (float) s.x[d];
	}
}

static AffStatus
cancelled(AffError *err)
{
	return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
}

/*
 * G = Q^T Q (upper triangle, row-major, F x F) in double: feature rows by
 * the pairs of each row's features; vectors by dsyrk over blocks of rows
 * copied to double (buf: at least F doubles, rows_per x F).
 */
static AffStatus
profile_gram(const Prof *P, const AffFitContext *cx, double *G, double *buf,
			 int64_t rows_per, AffError *err)
{
	int			F = P->F;
	int64_t		i;

	memset(G, 0, sizeof(double) * F * F);
	for (i = 0; i < P->n;)
	{
		int64_t		nr = P->n - i < rows_per ? P->n - i : rows_per;

		if (P->dense)
		{
			size_t		c;

			for (c = 0; c < (size_t) nr * F; c++)
				buf[c] = P->X[(size_t) i * F + c];
			cblas_dsyrk(CblasRowMajor, CblasUpper, CblasTrans, F, (int) nr, 1.0, buf, F,
						1.0, G, F);
		}
		else
		{
			int64_t		r;

			for (r = i; r < i + nr; r++)
			{
				int64_t		a;
				int64_t		c;
				int64_t		hi = P->ptr[r + 1];

				for (a = P->ptr[r]; a < hi; a++)
					for (c = a; c < hi; c++)
						G[(size_t) P->fi[a] * F + P->fi[c]] += (double) P->fv[a] * P->fv[c];
			}
		}
		i += nr;
		if (aff_fit_progress(cx, NULL, NULL))
			return cancelled(err);
	}
	return AFF_OK;
}

static AffStatus
too_large(AffError *err, double users, int F, double need, double limit)
{
	const double mb = 1024.0 * 1024.0;

	aff_fail(err, AFF_ERR_LIMIT, "the content model would be too large for one value");
	aff_detail(err, "%.0f users x %d features of preference vectors need %.0f MB; a model value holds at most %.0f MB.",
			   users, F, need / mb, limit / mb);
	return aff_hint(err, "Use fewer features (raise the profiles' min_document_frequency) or fit fewer users (min_user_interactions).");
}

static AffStatus
content_fit(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
			AffModelParts *parts, AffError *err)
{
	const AffAllocator *a = cx->alloc;
	ContentFit	cf;
	int			F;
	int64_t		u;
	int64_t		rows_per;
	double		need;
	double		model_need;
	double	   *Minv;
	double	   *M = NULL;
	double	   *buf;
	int			direct;
	int			info;
	int			t;
	AffStatus	st;

	memset(&cf, 0, sizeof(cf));
	if (parts->data[AFF_SEC_PROFILE_INFO] == NULL)
		return aff_fail(err, AFF_ERR_OPTION, "method \"content\" needs item profiles");
	prof_of(parts->data, m->n_items, &cf.P);
	F = cf.P.F;
	AFF_ASSERT(F >= 1);
	if ((st = aff_check_confidences(m, o, err)) != AFF_OK)
		return st;
	for (u = 0; u < m->n_users; u++)
		if (m->row_ptr[u + 1] - m->row_ptr[u] > cf.max_n)
			cf.max_n = m->row_ptr[u + 1] - m->row_ptr[u];
	cf.k = (int) (cf.max_n < F ? cf.max_n : F);
	direct = cf.max_n > F;
	rows_per = F >= 4096 ? 1 : 4096 / F;

	/* the preference vectors, in one value */
	model_need = 4.0 * (double) m->n_users * F;
	if (model_need > (double) cx->max_model_bytes)
		return too_large(err, (double) m->n_users, F, model_need, (double) cx->max_model_bytes);
	need = 8.0 * F * F * (direct ? 2 : 1)	/* M^-1, and M */
		+ 8.0 * rows_per * F	/* the Gram's row buffer */
		+ 8.0 * o->threads * (double) scratch_len(F, cf.k, cf.max_n, direct)
		+ 2.0 * model_need;		/* the vectors, and in the model */
	if ((st = aff_fit_check_memory(cx, "content", need, m, err)) != AFF_OK)
		return st;

	Minv = aff_alloc_array(a, (size_t) F * F, sizeof(double));
	buf = aff_alloc_array(a, (size_t) rows_per * F, sizeof(double));
	cf.X = aff_alloc_array(a, (size_t) m->n_users * F, sizeof(float));
	cf.scratch = aff_alloc_array(a, (size_t) o->threads, sizeof(double *));
	cf.bad_user = aff_alloc_array(a, (size_t) o->threads, sizeof(int64_t));
	if (direct)
		M = aff_alloc_array(a, (size_t) F * F, sizeof(double));
	if (!Minv || !buf || !cf.X || !cf.scratch || !cf.bad_user || (direct && !M))
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the content fit");
	for (t = 0; t < o->threads; t++)
	{
		cf.scratch[t] = aff_alloc_array(a, scratch_len(F, cf.k, cf.max_n, direct), sizeof(double));
		cf.bad_user[t] = -1;
		if (cf.scratch[t] == NULL)
			return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the content fit");
	}

	if (aff_fit_progress(cx, "affinity.fit content: the profiles' Gram matrix", NULL))
		return cancelled(err);
	if ((st = profile_gram(&cf.P, cx, Minv, buf, rows_per, err)) != AFF_OK)
		return st;
	aff_release(a, buf);
	for (t = 0; t < F; t++)
		Minv[(size_t) t * F + t] += o->regularization;
	if (direct)
		memcpy(M, Minv, sizeof(double) * F * F);
	if (aff_fit_progress(cx, "affinity.fit content: inverting the Gram matrix", NULL))
		return cancelled(err);
	/* row-major upper = column-major lower */
	dpotrf_("L", &F, Minv, &F, &info, 1);
	if (info == 0)
		dpotri_("L", &F, Minv, &F, &info, 1);
	if (info != 0)
	{
		aff_fail(err, AFF_ERR_NUMERIC, "the content fit's shared system is not positive definite");
		return aff_detail(err, "%d features, regularization %g.", F, o->regularization);
	}
	/* the upper triangle (row-major) holds M^-1: mirror it down */
	{
		int			r;
		int			c;

		for (r = 0; r < F; r++)
			for (c = r + 1; c < F; c++)
				Minv[(size_t) c * F + r] = Minv[(size_t) r * F + c];
	}
	cf.m = m;
	cf.o = o;
	cf.Minv = Minv;
	cf.M = M;
	if (aff_fit_progress(cx, "affinity.fit content: solving the users", NULL))
		return cancelled(err);
	if ((st = aff_parallel_for(o->threads, m->n_users, USER_BLOCK, fit_users, &cf,
							   cx->poll, cx->poll_arg, err)) != AFF_OK)
		return st;
	for (t = 0; t < o->threads; t++)
		if (cf.bad_user[t] >= 0)
		{
			aff_fail(err, AFF_ERR_NUMERIC, "the content fit of a user did not give a finite vector");
			aff_detail(err, "User %lld; regularization %g, alpha %g.",
					   (long long) m->user_keys[cf.bad_user[t]], o->regularization, o->alpha);
			return aff_hint(err, "Use a larger regularization or a smaller alpha.");
		}
	for (t = 0; t < o->threads; t++)
		aff_release(a, cf.scratch[t]);
	aff_release(a, Minv);
	if (M)
		aff_release(a, M);
	parts->data[AFF_SEC_USER_PROFILES] = cf.X;
	parts->count[AFF_SEC_USER_PROFILES] = (uint64_t) m->n_users * F;
	return AFF_OK;
}

/* ---- serving ---- */

static const float *
user_vector(const AffModelView *v, int64_t u)
{
	int			F = (int) ((const int64_t *) v->sections[AFF_SEC_PROFILE_INFO])[AFF_PINFO_FEATURES];

	return (const float *) v->sections[AFF_SEC_USER_PROFILES] + (size_t) u * F;
}

static void
content_user_scores(const AffServe *s, int64_t u, float *scores)
{
	Prof		P;
	const float *x;
	int64_t		i;

	prof_of(s->v->sections, s->v->h->n_items, &P);
	x = user_vector(s->v, u);
	for (i = 0; i < P.n; i++)
		scores[i] = (float) row_dot_f(&P, i, x);
}

static void
content_candidate_scores(const AffServe *s, int64_t u, const int32_t *cand, int64_t n,
						 float *scores)
{
	Prof		P;
	const float *x;
	int64_t		j;

	prof_of(s->v->sections, s->v->h->n_items, &P);
	x = user_vector(s->v, u);
	for (j = 0; j < n; j++)
		scores[cand[j]] = (float) row_dot_f(&P, cand[j], x);
}

static float
content_pair_score(const AffServe *s, int64_t u, int64_t i)
{
	Prof		P;

	prof_of(s->v->sections, s->v->h->n_items, &P);
	return (float) row_dot_f(&P, i, user_vector(s->v, u));
}

/*
 * Item i's features' shares of u's score of it: q_i[f] x_u[f] for each
 * feature f of the item's row (every dimension for dense profiles); they
 * add up to the score.
 */
static int64_t
content_feature_contributions(const AffServe *s, int64_t u, int64_t i, int32_t *feat,
							  float *contrib)
{
	Prof		P;
	const float *x;
	int64_t		n = 0;
	int64_t		j;

	prof_of(s->v->sections, s->v->h->n_items, &P);
	x = user_vector(s->v, u);
	if (P.dense)
	{
		const float *q = P.X + (size_t) i * P.F;
		int			d;

		for (d = 0; d < P.F; d++)
		{
			feat[n] = d;
			contrib[n++] = (float) ((double) q[d] * x[d]);
		}
		return n;
	}
	for (j = P.ptr[i]; j < P.ptr[i + 1]; j++)
	{
		feat[n] = P.fi[j];
		contrib[n++] = (float) ((double) P.fv[j] * x[P.fi[j]]);
	}
	return n;
}

/*
 * Solve (Q^T C Q + lambda I) x = rhs by conjugate gradients, C = 1 + d_j on
 * the n items idx and 1 elsewhere; products with Q^T Q go through Q.  The
 * system is symmetric positive definite (lambda > 0), so CG converges in at
 * most F steps in exact arithmetic; it stops when the residual falls below
 * 1e-12 of the right-hand side, or after 2F + 50 steps.
 */
static int
cg_solve(const Prof *P, double lambda, const int32_t *idx, const double *d, int64_t n,
		 const double *rhs, double *x, double *r, double *p, double *Ap)
{
	int			F = P->F;
	double		bb = 0;
	double		rr = 0;
	int			step;
	int			max_steps = 2 * F + 50;
	int64_t		i;
	int			f;

	memset(x, 0, sizeof(double) * F);
	for (f = 0; f < F; f++)
	{
		r[f] = rhs[f];
		p[f] = rhs[f];
		bb += rhs[f] * rhs[f];
	}
	rr = bb;
	if (bb == 0)
		return 1;
	for (step = 0; step < max_steps && rr > 1e-24 * bb; step++)
	{
		double		pAp = 0;
		double		al;
		double		rr_new = 0;

		for (f = 0; f < F; f++)
			Ap[f] = lambda * p[f];
		for (i = 0; i < P->n; i++)
		{
			double		t = row_dot(P, i, p);

			if (t != 0)
				row_axpy(P, i, t, Ap);
		}
		for (i = 0; i < n; i++)
		{
			double		t = row_dot(P, idx[i], p);

			if (d[i] > 0 && t != 0)
				row_axpy(P, idx[i], d[i] * t, Ap);
		}
		for (f = 0; f < F; f++)
			pAp += p[f] * Ap[f];
		if (!(pAp > 0))
			return 0;
		al = rr / pAp;
		for (f = 0; f < F; f++)
		{
			x[f] += al * p[f];
			r[f] -= al * Ap[f];
			rr_new += r[f] * r[f];
		}
		for (f = 0; f < F; f++)
			p[f] = r[f] + (rr_new / rr) * p[f];
		rr = rr_new;
	}
	for (f = 0; f < F; f++)
		if (!isfinite(x[f]))
			return 0;
	return 1;
}

/* The CG work space: conf, d (n each) and five vectors of F. */
typedef struct CgSpace
{
	double	   *conf;
	double	   *d;
	double	   *rhs;
	double	   *x;
	double	   *r;
	double	   *p;
	double	   *Ap;
	double	   *block;
} CgSpace;

static int
cg_space(const AffAllocator *a, int64_t n, int F, CgSpace *c)
{
	c->block = aff_alloc_array(a, (size_t) 2 * (size_t) (n + 1) + 5 * (size_t) F, sizeof(double));
	if (c->block == NULL)
		return 0;
	c->conf = c->block;
	c->d = c->conf + n + 1;
	c->rhs = c->d + n + 1;
	c->x = c->rhs + F;
	c->r = c->x + F;
	c->p = c->r + F;
	c->Ap = c->p + F;
	return 1;
}

/* A basket: its vector from the fit's problem on the profiles, then scores. */
static AffStatus
content_basket_scores(const AffServe *s, const int32_t *idx, const float *w, int64_t n,
					  float *scores, AffError *err)
{
	const AffModelHeader *h = s->v->h;
	Prof		P;
	CgSpace		c;
	int64_t		i;
	int			ok;

	prof_of(s->v->sections, h->n_items, &P);
	if (!cg_space(s->alloc, n, P.F, &c))
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the basket's solve");
	memset(c.rhs, 0, sizeof(double) * P.F);
	for (i = 0; i < n; i++)
	{
		c.conf[i] = aff_confidence(h->confidence, h->alpha, h->epsilon, w[i]);
		c.d[i] = c.conf[i] - 1.0;
		row_axpy(&P, idx[i], c.conf[i], c.rhs);
	}
	ok = cg_solve(&P, h->regularization, idx, c.d, n, c.rhs, c.x, c.r, c.p, c.Ap);
	if (ok)
		for (i = 0; i < P.n; i++)
			scores[i] = (float) row_dot(&P, i, c.x);
	aff_release(s->alloc, c.block);
	if (!ok)
	{
		aff_fail(err, AFF_ERR_NUMERIC, "the basket's regression did not give a finite vector");
		return aff_detail(err, "The model's regularization is %g.", h->regularization);
	}
	return AFF_OK;
}

/*
 * contrib[j] = c_uj q_j^T A_u^-1 q_i for the user's training items j; they
 * add up to q_i . x_u.
 */
static AffStatus
content_contributions(const AffServe *s, int64_t u, int64_t it, float *contrib,
					  AffError *err)
{
	const AffModelView *v = s->v;
	const AffModelHeader *h = v->h;
	int64_t		lo = v->seen_ptr[u];
	int64_t		n = v->seen_ptr[u + 1] - lo;
	const int32_t *idx = v->seen_items + lo;
	Prof		P;
	CgSpace		c;
	int64_t		j;
	int			ok;

	prof_of(v->sections, h->n_items, &P);
	if (!cg_space(s->alloc, n, P.F, &c))
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the user's solve");
	memset(c.rhs, 0, sizeof(double) * P.F);
	row_axpy(&P, it, 1.0, c.rhs);
	for (j = 0; j < n; j++)
	{
		c.conf[j] = aff_confidence(h->confidence, h->alpha, h->epsilon, v->seen_weights[lo + j]);
		c.d[j] = c.conf[j] - 1.0;
	}
	ok = cg_solve(&P, h->regularization, idx, c.d, n, c.rhs, c.x, c.r, c.p, c.Ap);
	if (ok)
		for (j = 0; j < n; j++)
			contrib[j] = (float) (c.conf[j] * row_dot(&P, idx[j], c.x));
	aff_release(s->alloc, c.block);
	if (!ok)
		return aff_fail(err, AFF_ERR_NUMERIC, "the user's regression did not give a finite vector");
	return AFF_OK;
}

static AffStatus
bad_content(AffError *err, const char *what, long long a, long long b)
{
	aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
	return aff_detail(err, "The content model's %s (%lld, %lld) are out of range.", what, a, b);
}

/*
 * Content checks: the profile sections as item_profiles checks them, the
 * preference vectors (users x features, finite), and the options the
 * serving solves read.
 */
static AffStatus
content_check(const AffModelView *v, AffPollFn poll, void *poll_arg, AffError *err)
{
	const AffModelHeader *h = v->h;
	const int64_t *info = v->sections[AFF_SEC_PROFILE_INFO];
	const float *X = v->sections[AFF_SEC_USER_PROFILES];
	uint64_t	n;
	uint64_t	i;
	AffStatus	st;

	if (!isfinite(h->regularization) || !(h->regularization > 0) ||
		!isfinite(h->alpha) || h->alpha < 0 || !isfinite(h->epsilon) || !(h->epsilon > 0) ||
		!isfinite(h->fit_seconds) || h->fit_seconds < 0 ||
		(h->confidence != AFF_CONFIDENCE_LINEAR && h->confidence != AFF_CONFIDENCE_LOG))
		return bad_content(err, "options", h->confidence, 0);
	if ((st = aff_profiles_check_sections(v, poll, poll_arg, err)) != AFF_OK)
		return st;
	n = (uint64_t) h->n_users * (uint64_t) info[AFF_PINFO_FEATURES];
	if (v->counts[AFF_SEC_USER_PROFILES] != n)
		return bad_content(err, "preference vector counts", (long long) v->counts[AFF_SEC_USER_PROFILES],
						   (long long) n);
	for (i = 0; i < n; i++)
	{
		if (!isfinite(X[i]))
			return bad_content(err, "preference values (user index, feature index) are not finite and",
							   (long long) (i / info[AFF_PINFO_FEATURES]),
							   (long long) (i % info[AFF_PINFO_FEATURES]));
		if ((i & 0xfffff) == 0xfffff && poll != NULL && poll(poll_arg))
			return aff_fail(err, AFF_ERR_CANCELLED, "checking the model was cancelled");
	}
	return AFF_OK;
}

const AffMethod aff_method_content = {
	.code = AFF_METHOD_CONTENT,
	.name = "content",
	.sections = (1u << AFF_SEC_PROFILE_INFO) | (1u << AFF_SEC_FEATURE_KEYS) |
	(1u << AFF_SEC_FEATURE_TEXT_OFF) | (1u << AFF_SEC_FEATURE_TEXT) |
	(1u << AFF_SEC_FEATURE_ITEMS) | (1u << AFF_SEC_PROFILE_PTR) |
	(1u << AFF_SEC_PROFILE_FEATURES) | (1u << AFF_SEC_PROFILE_VALUES) |
	(1u << AFF_SEC_PROFILE_VECTORS) | (1u << AFF_SEC_USER_PROFILES),
	.options = AFF_OPT_BIT(AFF_OPT_REGULARIZATION) | AFF_OPT_BIT(AFF_OPT_ALPHA) |
	AFF_OPT_BIT(AFF_OPT_CONFIDENCE) | AFF_OPT_BIT(AFF_OPT_EPSILON) |
	AFF_OPT_BIT(AFF_OPT_THREADS) | AFF_OPT_BIT(AFF_OPT_MIN_USER) |
	AFF_OPT_BIT(AFF_OPT_MIN_ITEM),
	.personal = true,
	.fit = content_fit,
	.user_scores = content_user_scores,
	.candidate_scores = content_candidate_scores,
	.basket_scores = content_basket_scores,
	.item_row = aff_profiles_item_row,
	.pair_score = content_pair_score,
	.contributions = content_contributions,
	.feature_contributions = content_feature_contributions,
	.check_content = content_check,
	.describe = aff_profiles_describe,
};

/* Whether text a of length la equals text b of length lb. */
static int
same_text(const char *a, int64_t la, const char *b, int64_t lb)
{
	return la == lb && memcmp(a, b, (size_t) la) == 0;
}

/*
 * The fitted rows m (over the purchased items) moved onto the catalogue of
 * the profiles pv: the items are pv's, in its order, bought or not; a
 * purchase of an item that pv does not describe is dropped and counted,
 * and so is a user left without purchases.  parts (header and common
 * sections filled from m) gets the new counts, keys, training lists,
 * popularity, item texts, the profile sections (pointing into pv) and
 * pv's text hash key, under which the caller has keyed the fit's texts;
 * m is replaced by the new matrix (row lists only).  With text item keys
 * each matched item's text is compared with the profiles' text.
 */
AffStatus
aff_content_attach(AffMatrix *m, const AffModelView *pv, AffModelParts *parts,
				   const AffAllocator *a, AffError *err)
{
	AffModelHeader *h = &parts->h;
	int			item_text = aff_keys_side_text(h->key_type, 0);
	int			user_text = aff_keys_side_text(h->key_type, 1);
	int64_t		n_items = pv->h->n_items;
	int32_t    *map = aff_alloc_array(a, (size_t) m->n_items + 1, sizeof(int32_t));
	int64_t    *ukeys = aff_alloc_array(a, (size_t) m->n_users + 1, sizeof(int64_t));
	int64_t    *ptr = aff_alloc_array(a, (size_t) m->n_users + 1, sizeof(int64_t));
	int32_t    *idx = aff_alloc_array(a, (size_t) m->nnz + 1, sizeof(int32_t));
	float	   *val = aff_alloc_array(a, (size_t) m->nnz + 1, sizeof(float));
	float	   *pop = aff_alloc_array(a, (size_t) n_items, sizeof(float));
	int64_t	   *keep = aff_alloc_array(a, (size_t) m->n_users + 1, sizeof(int64_t));
	int64_t		items_missing = 0;
	int64_t		nu = 0;
	int64_t		nnz = 0;
	int64_t		u;
	int64_t		i;
	int			k;

	if (!map || !ukeys || !ptr || !idx || !val || !pop || !keep)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the content fit");
	memset(pop, 0, sizeof(float) * (size_t) n_items);
	for (i = 0; i < m->n_items; i++)
	{
		int64_t		j = aff_find_key(pv->item_keys, n_items, m->item_keys[i]);

		if (j >= 0 && item_text)
		{
			const int64_t *off = parts->data[AFF_SEC_ITEM_TEXT_OFF];
			const char *txt = parts->data[AFF_SEC_ITEM_TEXT];

			if (!same_text(txt + off[i], off[i + 1] - off[i],
						   pv->item_text + pv->item_text_off[j],
						   pv->item_text_off[j + 1] - pv->item_text_off[j]))
			{
				aff_fail(err, AFF_ERR_INVALID, "a purchased item's text key shares its hash with another item of the profiles");
				aff_detail(err, "Item index %lld of the purchases and item index %lld of the profiles differ in text but not in hash.",
						   (long long) i, (long long) j);
				return aff_hint(err, "Build the item profiles again: they draw a new hash key.");
			}
		}
		map[i] = (int32_t) j;
		items_missing += j < 0;
	}
	ptr[0] = 0;
	for (u = 0; u < m->n_users; u++)
	{
		int64_t		before = nnz;
		int64_t		j;

		for (j = m->row_ptr[u]; j < m->row_ptr[u + 1]; j++)
		{
			int32_t		it = map[m->row_idx[j]];

			if (it < 0)
				continue;
			idx[nnz] = it;
			val[nnz] = m->row_val[j];
			pop[it] += 1.0f;
			nnz++;
		}
		keep[u] = nnz > before ? nu : -1;
		if (nnz > before)
		{
			ukeys[nu] = m->user_keys[u];
			ptr[++nu] = nnz;
		}
	}
	if (nnz == 0)
	{
		aff_fail(err, AFF_ERR_INVALID, "no purchase is of an item that the item profiles describe");
		aff_detail(err, "The purchases hold %lld items, the profiles %lld; they share none.",
				   (long long) m->n_items, (long long) n_items);
		return aff_hint(err, "Check that the purchases and the profiles use the same item ids.");
	}

	/* the user texts of the users kept */
	if (user_text && nu < m->n_users)
	{
		const int64_t *off = parts->data[AFF_SEC_USER_TEXT_OFF];
		const char *txt = parts->data[AFF_SEC_USER_TEXT];
		int64_t    *noff = aff_alloc_array(a, (size_t) nu + 1, sizeof(int64_t));
		char	   *ntxt = aff_alloc(a, (size_t) off[m->n_users] + 1);
		int64_t		at = 0;

		if (!noff || !ntxt)
			return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the content fit");
		noff[0] = 0;
		for (u = 0; u < m->n_users; u++)
			if (keep[u] >= 0)
			{
				memcpy(ntxt + at, txt + off[u], (size_t) (off[u + 1] - off[u]));
				at += off[u + 1] - off[u];
				noff[keep[u] + 1] = at;
			}
		parts->data[AFF_SEC_USER_TEXT_OFF] = noff;
		parts->count[AFF_SEC_USER_TEXT_OFF] = (uint64_t) nu + 1;
		parts->data[AFF_SEC_USER_TEXT] = ntxt;
		parts->count[AFF_SEC_USER_TEXT] = (uint64_t) at;
	}

	h->dropped_items += items_missing;
	h->dropped_interactions += m->nnz - nnz;
	h->dropped_users += m->n_users - nu;
	h->n_users = nu;
	h->n_items = n_items;
	h->nnz = nnz;
	h->text_hash_key[0] = pv->h->text_hash_key[0];
	h->text_hash_key[1] = pv->h->text_hash_key[1];

	parts->data[AFF_SEC_USER_KEYS] = ukeys;
	parts->count[AFF_SEC_USER_KEYS] = (uint64_t) nu;
	parts->data[AFF_SEC_ITEM_KEYS] = pv->item_keys;
	parts->count[AFF_SEC_ITEM_KEYS] = (uint64_t) n_items;
	parts->data[AFF_SEC_SEEN_PTR] = ptr;
	parts->count[AFF_SEC_SEEN_PTR] = (uint64_t) nu + 1;
	parts->data[AFF_SEC_SEEN_ITEMS] = idx;
	parts->count[AFF_SEC_SEEN_ITEMS] = (uint64_t) nnz;
	parts->data[AFF_SEC_SEEN_WEIGHTS] = val;
	parts->count[AFF_SEC_SEEN_WEIGHTS] = (uint64_t) nnz;
	parts->data[AFF_SEC_POPULARITY] = pop;
	parts->count[AFF_SEC_POPULARITY] = (uint64_t) n_items;
	if (item_text)
	{
		parts->data[AFF_SEC_ITEM_TEXT_OFF] = pv->item_text_off;
		parts->count[AFF_SEC_ITEM_TEXT_OFF] = (uint64_t) n_items + 1;
		parts->data[AFF_SEC_ITEM_TEXT] = pv->item_text;
		parts->count[AFF_SEC_ITEM_TEXT] = pv->item_text_len;
	}
	for (k = AFF_SEC_PROFILE_INFO; k <= AFF_SEC_PROFILE_VECTORS; k++)
	{
		parts->data[k] = pv->sections[k];
		parts->count[k] = pv->sections[k] ? pv->counts[k] : 0;
	}

	m->n_users = nu;
	m->n_items = n_items;
	m->nnz = nnz;
	m->user_keys = ukeys;
	m->item_keys = (int64_t *) pv->item_keys;
	m->row_ptr = ptr;
	m->row_idx = idx;
	m->row_val = val;
	m->col_ptr = NULL;
	m->col_idx = NULL;
	m->col_val = NULL;
	aff_release(a, map);
	aff_release(a, keep);
	return AFF_OK;
}
