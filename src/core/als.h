/*
 * als.h
 *		Implicit alternating least squares with confidence weights
 *		(Hu, Koren, Volinsky 2008), solved per row exactly (Cholesky) or by
 *		warm-started conjugate gradient (Takacs, Pilaszy, Tikk 2011).
 */
#ifndef AFF_ALS_H
#define AFF_ALS_H

#include "aff_core.h"
#include "interactions.h"

typedef struct AffAlsParams
{
	int			factors;
	int			iterations;
	int			solver;			/* AFF_SOLVER_* */
	int			solver_steps;
	int			confidence;		/* AFF_CONFIDENCE_* */
	int			threads;		/* >= 1, already resolved */
	double		regularization;
	double		alpha;
	double		epsilon;
	uint64_t	seed;
	int64_t		gather_budget;	/* cg: interactions gathered per block; 0: the default */
} AffAlsParams;

typedef struct AffAls
{
	const AffMatrix *m;
	AffAlsParams p;
	float	   *X;				/* [n_users * f] user factors */
	float	   *Y;				/* [n_items * f] item factors */
	float	   *row_conf;		/* [nnz] confidence c_ui in row order */
	float	   *col_conf;		/* [nnz] the same in column order */
	float	   *gram_f;			/* [f * f] BLAS output */
	double	   *gram;			/* [f * f] Gram matrix of the fixed side */
	double		trace_x;		/* sum of |x_u|^2 at the last user solve */
	double	   *scratch;		/* per-thread solver scratch */
	size_t		scratch_len;	/* doubles per thread */
	double	   *block_sums;		/* per-block partial sums, summed in order */
	int64_t		max_blocks;
	int			gram_is_y;		/* gram currently holds Y^T Y */
	/* cg */
	float	   *gram_sym_f;		/* [f * f] gram, full, single precision */
	float	   *fscratch;		/* per-thread cg vectors and gather buffer */
	size_t		fscratch_len;	/* floats per thread */
	double	   *block_sq;		/* per-block sums of |y|^2 (the loss) */
	int64_t    *user_starts;	/* [n_user_blocks + 1] first row of each block */
	int64_t    *item_starts;	/* [n_item_blocks + 1] */
	int64_t    *user_order;		/* user blocks in the order they are taken */
	int64_t    *item_order;
	int64_t		n_user_blocks;
	int64_t		n_item_blocks;
	int64_t		budget;			/* interactions gathered per block at most */
} AffAls;

extern double aff_confidence(int kind, double alpha, double epsilon, double w);
extern AffStatus aff_als_init(AffAls *s, const AffMatrix *m,
							  const AffAlsParams *p, const AffAllocator *a,
							  AffError *err);
extern AffStatus aff_als_sweep(AffAls *s, double *loss, AffPollFn poll,
							   void *poll_arg, AffError *err);
extern void aff_als_free(AffAls *s, const AffAllocator *a);

/* Dense helpers shared with serving (fold-in). */
extern void aff_gram(const float *F, int64_t n, int f, int threads,
					 float *gram_f, double *gram);
extern int	aff_solve_row(const float *F, const double *gram, int f,
						  double lambda, const int32_t *idx, const float *conf,
						  int64_t len, int solver, int solver_steps, float *x,
						  double *scratch);
extern int	aff_solve_system(const float *F, const double *gram, int f,
							 double lambda, const int32_t *idx, const float *conf,
							 int64_t len, const float *rhs, float *z,
							 double *scratch);
extern size_t aff_solve_scratch_len(int f);

#endif
