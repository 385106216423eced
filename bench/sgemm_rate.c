/*
 * sgemm_rate.c
 *		The rate OpenBLAS reaches on this machine for a square single-precision
 *		matrix product (and, for reference, the double-precision one), at the
 *		given thread counts.  The reference against which bench/fit and
 *		bench/serving put their own GFLOP/s.
 *
 *	cc -O2 -o sgemm_rate sgemm_rate.c -lopenblas
 *	./sgemm_rate [n [threads...]]		default: n = 2048, threads 1 2
 *
 * Prints one JSON object per line:
 *	{"routine": "sgemm", "n": 2048, "threads": 1, "best_seconds": ..., "gflops": ...}
 * with gflops = 2 n^3 / best time of a few runs (after one warm-up run).
 * Then the memory bandwidth by a triad, a[i] = b[i] + s c[i] over three
 * arrays of 2^25 floats (128 MB each, far beyond any cache), split among
 * the threads:
 *	{"routine": "triad", "threads": 1, "bytes": ..., "best_seconds": ..., "gbytes_per_s": ...}
 * counting 12 bytes an element (two reads, one write), as STREAM does.
 */
#include <cblas.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

extern void openblas_set_num_threads(int);
extern char *openblas_get_corename(void);

static double
now(void)
{
	struct timespec ts;

	clock_gettime(CLOCK_MONOTONIC, &ts);
	return ts.tv_sec + ts.tv_nsec * 1e-9;
}

/* Fill with a cheap deterministic pattern in [-0.5, 0.5). */
static void
fill(float *f, double *d, size_t len, unsigned seed)
{
	size_t		i;
	unsigned	x = seed;

	for (i = 0; i < len; i++)
	{
		x = x * 1664525u + 1013904223u;
		if (f)
			f[i] = (float) ((x >> 8) / 16777216.0 - 0.5);
		if (d)
			d[i] = (x >> 8) / 16777216.0 - 0.5;
	}
}

static double
best_of(int is_double, int n, void *a, void *b, void *c)
{
	double		best = 1e30;
	double		spent = 0.0;
	int			rep;

	for (rep = 0; rep < 8 && (rep < 3 || spent < 1.0); rep++)
	{
		double		t0 = now();
		double		t;

		if (is_double)
			cblas_dgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, n, n, n, 1.0,
						a, n, b, n, 0.0, c, n);
		else
			cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, n, n, n, 1.0f,
						a, n, b, n, 0.0f, c, n);
		t = now() - t0;
		spent += t;
		if (rep > 0 && t < best)	/* run 0 is the warm-up */
			best = t;
	}
	return best;
}

#define TRIAD_LEN ((size_t) 1 << 25)

typedef struct Triad
{
	float	   *a;
	const float *b;
	const float *c;
	size_t		begin;
	size_t		end;
} Triad;

static void *
triad_part(void *arg)
{
	Triad	   *t = arg;
	size_t		i;

	for (i = t->begin; i < t->end; i++)
		t->a[i] = t->b[i] + 3.0f * t->c[i];
	return NULL;
}

/* Best seconds of a few triads over TRIAD_LEN elements on `threads` threads. */
static double
triad_best(int threads, float *a, const float *b, const float *c)
{
	double		best = 1e30;
	int			rep;

	for (rep = 0; rep < 6; rep++)
	{
		pthread_t	th[64];
		Triad		part[64];
		double		t0 = now();
		double		t;
		int			k;

		for (k = 0; k < threads; k++)
		{
			part[k].a = a;
			part[k].b = b;
			part[k].c = c;
			part[k].begin = TRIAD_LEN * k / threads;
			part[k].end = TRIAD_LEN * (k + 1) / threads;
			if (k > 0)
				pthread_create(&th[k], NULL, triad_part, &part[k]);
		}
		triad_part(&part[0]);
		for (k = 1; k < threads; k++)
			pthread_join(th[k], NULL);
		t = now() - t0;
		if (rep > 0 && t < best)	/* run 0 is the warm-up (first touch) */
			best = t;
	}
	return best;
}

int
main(int argc, char **argv)
{
	int			n = argc > 1 ? atoi(argv[1]) : 2048;
	int			default_threads[] = {1, 2};
	int			nthreads = argc > 2 ? argc - 2 : 2;
	size_t		len;
	float	   *af, *bf, *cf;
	double	   *ad, *bd, *cd;
	int			t;
	int			is_double;

	if (n < 16 || n > 16384)
	{
		fprintf(stderr, "n must be between 16 and 16384\n");
		return 2;
	}
	len = (size_t) n * n;
	af = malloc(len * sizeof(float));
	bf = malloc(len * sizeof(float));
	cf = malloc(len * sizeof(float));
	ad = malloc(len * sizeof(double));
	bd = malloc(len * sizeof(double));
	cd = malloc(len * sizeof(double));
	if (!af || !bf || !cf || !ad || !bd || !cd)
	{
		fprintf(stderr, "out of memory\n");
		return 1;
	}
	fill(af, ad, len, 1);
	fill(bf, bd, len, 2);

	for (t = 0; t < nthreads; t++)
	{
		int			threads = argc > 2 ? atoi(argv[t + 2]) : default_threads[t];

		if (threads < 1)
			continue;
		openblas_set_num_threads(threads);
		for (is_double = 0; is_double <= 1; is_double++)
		{
			double		s = best_of(is_double, n,
									is_double ? (void *) ad : (void *) af,
									is_double ? (void *) bd : (void *) bf,
									is_double ? (void *) cd : (void *) cf);

			printf("{\"routine\": \"%s\", \"n\": %d, \"threads\": %d, \"core\": \"%s\", "
				   "\"best_seconds\": %.6f, \"gflops\": %.2f}\n",
				   is_double ? "dgemm" : "sgemm", n, threads, openblas_get_corename(),
				   s, 2.0 * n * (double) n * n / s / 1e9);
			fflush(stdout);
		}
	}
	free(af);
	free(bf);
	free(cf);
	af = malloc(TRIAD_LEN * sizeof(float));
	bf = malloc(TRIAD_LEN * sizeof(float));
	cf = malloc(TRIAD_LEN * sizeof(float));
	if (!af || !bf || !cf)
	{
		fprintf(stderr, "out of memory\n");
		return 1;
	}
	fill(bf, NULL, TRIAD_LEN, 3);
	fill(cf, NULL, TRIAD_LEN, 4);
	for (t = 0; t < nthreads; t++)
	{
		int			threads = argc > 2 ? atoi(argv[t + 2]) : default_threads[t];
		double		s;

		if (threads < 1 || threads > 64)
			continue;
		s = triad_best(threads, af, bf, cf);
		printf("{\"routine\": \"triad\", \"threads\": %d, \"bytes\": %.0f, "
			   "\"best_seconds\": %.6f, \"gbytes_per_s\": %.2f}\n",
			   threads, 12.0 * TRIAD_LEN, s, 12.0 * TRIAD_LEN / s / 1e9);
		fflush(stdout);
	}
	return 0;
}
