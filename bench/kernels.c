/*
 * kernels.c
 *		Times the engine's ALS sweep outside the server, on an invented
 *		random matrix, so kernel changes can be compared side by side and
 *		the function versions (AVX-512, AVX2, baseline) checked against one
 *		another.  Build and run: bench/kernels (see that script).
 *
 * Usage: kernels USERS ITEMS NNZ FACTORS SOLVER(cg|cholesky) THREADS SWEEPS [SKEW]
 * Items are drawn as u^SKEW of a uniform u (2 by default; 3 gives a few
 * items a large share of the interactions, as in bench/gen_purchases.sql).
 * Prints seconds per sweep and the loss after each sweep.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <time.h>

#include "../src/core/als.h"
#include "../src/core/interactions.h"

static void *
m_alloc(void *ctx, size_t n)
{
	(void) ctx;
	return malloc(n);
}

static void
m_release(void *ctx, void *p)
{
	(void) ctx;
	free(p);
}

static double
now(void)
{
	struct timespec t;

	clock_gettime(CLOCK_MONOTONIC, &t);
	return t.tv_sec + t.tv_nsec * 1e-9;
}

int
main(int argc, char **argv)
{
	AffAllocator a = {m_alloc, m_release, NULL};
	AffError	err;
	AffMatrix	m;
	AffBuildParams bp;
	AffAls		als;
	AffAlsParams p;
	AffTriple  *rows;
	int64_t		n_users, n_items, nnz, i;
	uint64_t	state = 12345;
	int			sweeps, s;
	double		t_build, t_init;
	double		skew;

	if (argc != 8 && argc != 9)
	{
		fprintf(stderr, "usage: %s USERS ITEMS NNZ FACTORS cg|cholesky THREADS SWEEPS [SKEW]\n", argv[0]);
		return 2;
	}
	skew = argc == 9 ? atof(argv[8]) : 2.0;
	n_users = atoll(argv[1]);
	n_items = atoll(argv[2]);
	nnz = atoll(argv[3]);
	memset(&p, 0, sizeof(p));
	p.factors = atoi(argv[4]);
	p.solver = strcmp(argv[5], "cholesky") == 0 ? AFF_SOLVER_CHOLESKY : AFF_SOLVER_CG;
	p.threads = atoi(argv[6]);
	sweeps = atoi(argv[7]);
	p.iterations = sweeps;
	p.solver_steps = 3;
	p.confidence = AFF_CONFIDENCE_LOG;
	p.regularization = 30;
	p.alpha = 10;
	p.epsilon = 1;
	p.seed = 42;

	rows = malloc(sizeof(AffTriple) * nnz);
	for (i = 0; i < nnz; i++)
	{
		/* xorshift64*: skewed items (a power of a uniform), uniform users */
		double		uu;

		state ^= state >> 12;
		state ^= state << 25;
		state ^= state >> 27;
		rows[i].user = (int64_t) ((state * 2685821657736338717ULL) % (uint64_t) n_users);
		state ^= state >> 12;
		state ^= state << 25;
		state ^= state >> 27;
		uu = (double) ((state * 2685821657736338717ULL) >> 11) / 9007199254740992.0;
		rows[i].item = (int64_t) (pow(uu, skew) * (double) n_items);
		rows[i].weight = 1.0f;
	}
	/* the build's index key may be fixed here: these ids are not hostile */
	bp.min_user = 1;
	bp.min_item = 1;
	bp.index_key[0] = 0x243f6a8885a308d3ULL;
	bp.index_key[1] = 0x13198a2e03707344ULL;
	bp.poll = NULL;
	bp.poll_arg = NULL;
	t_build = now();
	if (aff_matrix_build(rows, nnz, &bp, &a, &m, &err) != AFF_OK)
	{
		fprintf(stderr, "%s: %s\n", err.msg, err.detail);
		return 1;
	}
	t_build = now() - t_build;
	t_init = now();
	if (aff_als_init(&als, &m, &p, &a, &err) != AFF_OK)
	{
		fprintf(stderr, "%s: %s\n", err.msg, err.detail);
		return 1;
	}
	t_init = now() - t_init;
	printf("users %lld items %lld nnz %lld factors %d solver %s threads %d\n",
		   (long long) m.n_users, (long long) m.n_items, (long long) m.nnz,
		   p.factors, argv[5], p.threads);
	printf("matrix build %.3f s, initial factors %.3f s\n", t_build, t_init);
	for (s = 0; s < sweeps; s++)
	{
		double		t0 = now();
		double		loss;

		if (aff_als_sweep(&als, &loss, NULL, NULL, &err) != AFF_OK)
		{
			fprintf(stderr, "%s\n", err.msg);
			return 1;
		}
		printf("sweep %d: %.3f s, loss %.10g\n", s + 1, now() - t0, loss);
	}
	return 0;
}
