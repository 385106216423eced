/*
 * method_als.c
 *		implicit_als as a method: the fit (sweeps of als.c with progress and
 *		a divergence check) and serving from the factors.
 *
 * Scores are x_u . y_i (Hu, Koren, Volinsky 2008).  A basket is folded in:
 * its user vector is the exact solution of the fit's per-row problem
 * against the fixed item factors.  The contributions of a user's training
 * items to the score of item i follow section 5 of the same paper: with
 * W = (Y^T C_u Y + lambda I)^-1, training item j adds c_uj y_i^T W y_j.
 */
#include "method.h"
#include "als.h"
#include "serve.h"

#include <cblas.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

/* Index of the first non-finite value of x[0 .. n), or -1. */
static int64_t
first_non_finite(const float *x, size_t n)
{
	size_t		i;

	for (i = 0; i < n; i++)
		if (!isfinite(x[i]))
			return (int64_t) i;
	return -1;
}

/* The error of a fit whose loss or factors stopped being finite. */
static AffStatus
diverged(const AffOptions *o, int sweep, double loss, AffError *err)
{
	aff_fail(err, AFF_ERR_NUMERIC, "the implicit_als fit diverged at sweep %d of %d",
			 sweep, o->iterations);
	aff_detail(err, "The loss (%g) or a factor is not finite; the options were factors %d, regularization %g, alpha %g, confidence %s, epsilon %g, solver %s.",
			   loss, o->factors, o->regularization, o->alpha,
			   o->confidence == AFF_CONFIDENCE_LINEAR ? "linear" : "log", o->epsilon,
			   o->solver == AFF_SOLVER_CG ? "cg" : "cholesky");
	return aff_hint(err, "Use a larger regularization, a smaller alpha, or \"confidence\": \"log\".");
}

/* The sweeps: fills the factor, loss and timing sections of parts. */
static AffStatus
als_fit(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
		AffModelParts *parts, AffError *err)
{
	const AffAllocator *a = cx->alloc;
	AffAlsParams p;
	AffAls		als;
	double	   *loss = aff_alloc_array(a, (size_t) o->iterations, sizeof(double));
	double	   *secs = aff_alloc_array(a, (size_t) o->iterations, sizeof(double));
	double		total = 0;
	char		title[96];
	char		notice[160];
	AffStatus	st;
	int			s;

	AFF_ASSERT(o->factors >= 1 && o->factors <= AFF_MAX_FACTORS);
	AFF_ASSERT(o->iterations >= 1);
	if (loss == NULL || secs == NULL)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the fit's sweep records");
	if ((st = aff_check_confidences(m, o, err)) != AFF_OK)
		return st;
	p.factors = o->factors;
	p.iterations = o->iterations;
	p.solver = o->solver;
	p.solver_steps = o->solver_steps;
	p.confidence = o->confidence;
	p.threads = o->threads;
	p.regularization = o->regularization;
	p.alpha = o->alpha;
	p.epsilon = o->epsilon;
	p.seed = (uint64_t) o->seed;
	p.gather_budget = 0;		/* the engine's default */
	if ((st = aff_als_init(&als, m, &p, a, err)) != AFF_OK)
		return st;

	for (s = 0; s < o->iterations; s++)
	{
		double		t0;

		snprintf(title, sizeof(title), "affinity.fit sweep %d of %d", s + 1, o->iterations);
		if (aff_fit_progress(cx, title, NULL))
			return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
		t0 = aff_clock();
		if ((st = aff_als_sweep(&als, &loss[s], cx->poll, cx->poll_arg, err)) != AFF_OK)
			return st;
		secs[s] = aff_clock() - t0;
		total += secs[s];
		if (!isfinite(loss[s]) ||
			first_non_finite(als.X, (size_t) m->n_users * o->factors) >= 0 ||
			first_non_finite(als.Y, (size_t) m->n_items * o->factors) >= 0)
			return diverged(o, s + 1, loss[s], err);
		if (o->verbose)
		{
			snprintf(notice, sizeof(notice),
					 "affinity.fit sweep %d of %d: loss %.6g, %.3f s, about %.1f s left",
					 s + 1, o->iterations, loss[s], secs[s],
					 total / (s + 1) * (o->iterations - s - 1));
			if (aff_fit_progress(cx, NULL, notice))
				return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
		}
	}
	parts->data[AFF_SEC_USER_FACTORS] = als.X;
	parts->count[AFF_SEC_USER_FACTORS] = (uint64_t) m->n_users * o->factors;
	parts->data[AFF_SEC_ITEM_FACTORS] = als.Y;
	parts->count[AFF_SEC_ITEM_FACTORS] = (uint64_t) m->n_items * o->factors;
	parts->data[AFF_SEC_LOSS] = loss;
	parts->count[AFF_SEC_LOSS] = (uint64_t) o->iterations;
	parts->data[AFF_SEC_SWEEP_SECONDS] = secs;
	parts->count[AFF_SEC_SWEEP_SECONDS] = (uint64_t) o->iterations;
	return AFF_OK;
}

/* scores = Y x for the vector x (f floats). */
static void
scores_of_vector(const AffModelView *v, const float *x, float *scores)
{
	cblas_sgemv(CblasRowMajor, CblasNoTrans, (int) v->h->n_items,
				v->h->factors, 1.0f, v->item_factors, v->h->factors,
				x, 1, 0.0f, scores, 1);
}

static void
als_user_scores(const AffServe *s, int64_t u, float *scores)
{
	const AffModelView *v = s->v;

	AFF_ASSERT(u >= 0 && u < v->h->n_users);
	scores_of_vector(v, v->user_factors + (size_t) u * v->h->factors, scores);
}

/* A block of users: X_block Y^T with one sgemm (single-threaded BLAS). */
static void
als_block_scores(const AffServe *s, const int32_t *users, int64_t n, float *work,
				 float *scores)
{
	const AffModelView *v = s->v;
	int			f = v->h->factors;
	int64_t		r;

	for (r = 0; r < n; r++)
		memcpy(work + (size_t) r * f, v->user_factors + (size_t) users[r] * f,
			   sizeof(float) * f);
	cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int) n, (int) v->h->n_items, f,
				1.0f, work, f, v->item_factors, f, 0.0f, scores, (int) v->h->n_items);
}

/* A short candidate list costs one dot product per candidate. */
static void
als_candidate_scores(const AffServe *s, int64_t u, const int32_t *cand, int64_t n,
					 float *scores)
{
	const AffModelView *v = s->v;
	int			f = v->h->factors;
	const float *x = v->user_factors + (size_t) u * f;
	int64_t		j;

	for (j = 0; j < n; j++)
		scores[cand[j]] = aff_dot_f(v->item_factors + (size_t) cand[j] * f, x, f);
}

/* The confidences of n training weights under the model's options. */
static void
confidences(const AffModelHeader *h, const float *w, int64_t n, float *conf)
{
	int64_t		i;

	for (i = 0; i < n; i++)
		conf[i] = (float) aff_confidence(h->confidence, h->alpha, h->epsilon, w[i]);
}

/*
 * Fold-in: the user vector that the fit's per-row problem gives for this
 * basket against the fixed item factors, solved exactly (Cholesky), with
 * the model's confidence, alpha, epsilon and regularization; then its
 * scores.
 */
static AffStatus
als_basket_scores(const AffServe *s, const int32_t *idx, const float *w, int64_t n,
				  float *scores, AffError *err)
{
	const AffModelView *v = s->v;
	const AffModelHeader *h = v->h;
	int			f = h->factors;
	float	   *conf = aff_alloc_array(s->alloc, (size_t) n + 1, sizeof(float));
	double	   *scratch = aff_alloc_array(s->alloc, aff_solve_scratch_len(f), sizeof(double));
	float	   *x = aff_alloc_array(s->alloc, (size_t) f, sizeof(float));
	int			ok;

	AFF_ASSERT(s->gram != NULL);
	if (!conf || !scratch || !x)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the basket's solve");
	confidences(h, w, n, conf);
	memset(x, 0, sizeof(float) * f);
	ok = aff_solve_row(v->item_factors, s->gram, f, h->regularization, idx, conf, n,
					   AFF_SOLVER_CHOLESKY, 0, x, scratch);
	if (ok)
		scores_of_vector(v, x, scores);
	aff_release(s->alloc, conf);
	aff_release(s->alloc, scratch);
	aff_release(s->alloc, x);
	if (!ok)
	{
		aff_fail(err, AFF_ERR_NUMERIC, "the basket's least-squares system is not positive definite");
		return aff_detail(err, "The model's regularization is %g.", h->regularization);
	}
	return AFF_OK;
}

/* Items like it: cosine of the item factors; it itself is no answer. */
static void
als_item_row(const AffServe *s, int64_t it, float *sims, uint8_t *skip)
{
	const AffModelView *v = s->v;

	AFF_ASSERT(s->item_norms != NULL);
	aff_cosine_row(v->item_factors, s->item_norms, v->h->n_items, v->h->factors, it, sims);
	memset(skip, 0, (size_t) v->h->n_items);
	skip[it] = 1;
}

static float
als_pair_score(const AffServe *s, int64_t u, int64_t i)
{
	const AffModelView *v = s->v;
	int			f = v->h->factors;

	return aff_dot_f(v->user_factors + (size_t) u * f, v->item_factors + (size_t) i * f, f);
}

/*
 * contrib[j] = c_uj y_i^T W y_j for the user's training items j; they add
 * up to y_i . x with x the user's vector solved exactly against the
 * current item factors.
 */
static AffStatus
als_contributions(const AffServe *s, int64_t u, int64_t i, float *contrib,
				  AffError *err)
{
	const AffModelView *v = s->v;
	const AffModelHeader *h = v->h;
	int			f = h->factors;
	int64_t		lo = v->seen_ptr[u];
	int64_t		n = v->seen_ptr[u + 1] - lo;
	const int32_t *idx = v->seen_items + lo;
	float	   *conf = aff_alloc_array(s->alloc, (size_t) n + 1, sizeof(float));
	double	   *scratch = aff_alloc_array(s->alloc, aff_solve_scratch_len(f), sizeof(double));
	float	   *z = aff_alloc_array(s->alloc, (size_t) f, sizeof(float));
	int64_t		j;
	int			ok;

	AFF_ASSERT(s->gram != NULL);
	if (!conf || !scratch || !z)
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the user's solve");
	/* z = W y_i: the row system with b = y_i */
	confidences(h, v->seen_weights + lo, n, conf);
	ok = aff_solve_system(v->item_factors, s->gram, f, h->regularization, idx, conf, n,
						  v->item_factors + (size_t) i * f, z, scratch);
	if (ok)
		for (j = 0; j < n; j++)
			contrib[j] = conf[j] * aff_dot_f(z, v->item_factors + (size_t) idx[j] * f, f);
	aff_release(s->alloc, conf);
	aff_release(s->alloc, scratch);
	aff_release(s->alloc, z);
	if (!ok)
		return aff_fail(err, AFF_ERR_NUMERIC,
						"the user's least-squares system is not positive definite");
	return AFF_OK;
}

const AffMethod aff_method_implicit_als = {
	.code = AFF_METHOD_IMPLICIT_ALS,
	.name = "implicit_als",
	.sections = (1u << AFF_SEC_USER_FACTORS) | (1u << AFF_SEC_ITEM_FACTORS) |
	(1u << AFF_SEC_LOSS) | (1u << AFF_SEC_SWEEP_SECONDS),
	.options = AFF_OPT_BIT(AFF_OPT_FACTORS) | AFF_OPT_BIT(AFF_OPT_ITERATIONS) |
	AFF_OPT_BIT(AFF_OPT_REGULARIZATION) | AFF_OPT_BIT(AFF_OPT_ALPHA) |
	AFF_OPT_BIT(AFF_OPT_CONFIDENCE) | AFF_OPT_BIT(AFF_OPT_EPSILON) |
	AFF_OPT_BIT(AFF_OPT_SOLVER) | AFF_OPT_BIT(AFF_OPT_SOLVER_STEPS) |
	AFF_OPT_BIT(AFF_OPT_SEED) | AFF_OPT_BIT(AFF_OPT_THREADS) |
	AFF_OPT_BIT(AFF_OPT_MIN_USER) | AFF_OPT_BIT(AFF_OPT_MIN_ITEM),
	.has_factors = true,
	.has_sweeps = true,
	.needs_gram = true,
	.user_vectors = true,
	.personal = true,
	.fit = als_fit,
	.user_scores = als_user_scores,
	.block_scores = als_block_scores,
	.candidate_scores = als_candidate_scores,
	.basket_scores = als_basket_scores,
	.item_row = als_item_row,
	.pair_score = als_pair_score,
	.contributions = als_contributions,
};
