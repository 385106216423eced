/*
 * blas_pool.c
 *		Start OpenBLAS's thread pool with all signals blocked.
 *
 * The pthreads build of OpenBLAS starts its pool in the library's
 * constructor, when the extension is loaded, and adds threads whenever
 * openblas_set_num_threads asks for more than it has.  A thread inherits
 * its creator's signal mask, so those threads would accept the signals
 * PostgreSQL sends a backend (cancel, terminate, latch wake-ups, timers),
 * and the kernel may run the backend's handlers on them.  Here the pool is
 * shut down and started again, and grown, only with every signal blocked.
 *
 * blas_thread_shutdown_ and blas_thread_init are exported by the pthreads
 * build (its fork handler uses the first); they are declared weak so that
 * a build without them (the OpenMP variant, whose pool starts lazily) still
 * loads: then a threaded warm-up call starts that pool inside the blocked
 * region instead.
 */
#include "blas_pool.h"

#include <cblas.h>
#include <pthread.h>
#include <signal.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

extern int	blas_thread_shutdown_(void) __attribute__((weak));
extern int	blas_thread_init(void) __attribute__((weak));

static pid_t pool_pid = 0;		/* process whose pool was restarted */
static int	pool_threads = 0;	/* threads the pool serves (1 + workers) */

/* MAX_THREADS=<n> from openblas_get_config(), else 64 (Debian's value). */
int
aff_blas_build_threads(void)
{
	const char *cfg = openblas_get_config();
	const char *p = cfg ? strstr(cfg, "MAX_THREADS=") : NULL;
	long		n;

	if (p == NULL)
		return 64;
	n = strtol(p + strlen("MAX_THREADS="), NULL, 10);
	return n >= 1 && n <= 4096 ? (int) n : 64;
}

/* OpenBLAS's memory.c keeps NUM_BUFFERS = max(50, 2 * NUM_THREADS) work buffers. */
int
aff_blas_max_callers(void)
{
	int			n = 2 * aff_blas_build_threads();

	return n < 50 ? 50 : n;
}

/*
 * A threaded product big enough for OpenBLAS to split it: it starts a pool
 * that is created lazily (the OpenMP variant, or one shut down by a fork).
 */
static void
warm_up(void)
{
	enum
	{
		N = 256
	};
	static float a[N * N];
	static float c[N * N];

	cblas_ssyrk(CblasRowMajor, CblasUpper, CblasTrans, N, N, 1.0f, a, N, 0.0f, c, N);
}

void
aff_blas_pool_prepare(int threads)
{
	int			limit = aff_blas_build_threads();
	sigset_t	all;
	sigset_t	old;

	if (threads > limit)
		threads = limit;
	if (threads < 2)
		threads = 2;			/* the load-time pool is replaced all the same */
	if (pool_pid == getpid() && pool_threads >= threads)
		return;

	sigfillset(&all);
	pthread_sigmask(SIG_BLOCK, &all, &old);
	if (pool_pid != getpid())
	{
		/* the threads started at load time (or before a fork) go */
		if (blas_thread_shutdown_ != NULL)
			blas_thread_shutdown_();
		pool_threads = 0;
	}
	openblas_set_num_threads(threads);	/* adds threads past the current count */
	if (blas_thread_init != NULL)
		blas_thread_init();		/* restarts a shut-down pool */
	warm_up();
	openblas_set_num_threads(1);
	pthread_sigmask(SIG_SETMASK, &old, NULL);
	pool_pid = getpid();
	pool_threads = threads;
}
