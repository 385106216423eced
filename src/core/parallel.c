/*
 * parallel.c
 *		Block-parallel loop: the calling thread and nthreads - 1 workers take
 *		fixed-size blocks of rows from a shared atomic counter.
 *
 * The calling thread works too, and between its blocks it calls the poll
 * callback; that is how a PostgreSQL backend notices a cancel request within
 * a fraction of a second without any worker ever touching the server.  All
 * signals are blocked while the workers are created, so they inherit a full
 * signal mask and every signal keeps going to the backend's own thread.
 *
 * Which thread runs a block never changes what the block computes, so
 * results are the same for any thread count.
 */
#include "parallel.h"

#include <pthread.h>
#include <signal.h>
#include <stdatomic.h>
#include <unistd.h>

#define AFF_MAX_WORKERS 256

typedef struct ParallelJob
{
	AffRangeFn	fn;
	void	   *arg;
	int64_t		n;
	int64_t		block;
	atomic_llong next;
	atomic_int	stop;
} ParallelJob;

typedef struct WorkerArg
{
	ParallelJob *job;
	int			thread_no;
} WorkerArg;

/* Take blocks until none are left or a stop is requested. */
static void
run_blocks(ParallelJob *job, int thread_no, AffPollFn poll, void *poll_arg)
{
	for (;;)
	{
		int64_t		b;
		int64_t		begin;
		int64_t		end;

		if (atomic_load_explicit(&job->stop, memory_order_relaxed))
			return;
		if (poll != NULL && poll(poll_arg))
		{
			atomic_store(&job->stop, 1);
			return;
		}
		b = atomic_fetch_add(&job->next, 1);
		begin = b * job->block;
		if (begin >= job->n)
			return;
		end = begin + job->block;
		if (end > job->n)
			end = job->n;
		job->fn(job->arg, thread_no, b, begin, end);
	}
}

static void *
worker_main(void *p)
{
	WorkerArg  *w = (WorkerArg *) p;

	run_blocks(w->job, w->thread_no, NULL, NULL);
	return NULL;
}

/*
 * Run fn over [0, n) in blocks of `block` rows on nthreads threads (the
 * caller included).  If a thread cannot be created the remaining work is
 * shared by those that exist.  Returns AFF_ERR_CANCELLED when poll asked to
 * stop; every worker has been joined before this returns, in all cases.
 */
AffStatus
aff_parallel_for(int nthreads, int64_t n, int64_t block, AffRangeFn fn,
				 void *arg, AffPollFn poll, void *poll_arg, AffError *err)
{
	ParallelJob job;
	pthread_t	tids[AFF_MAX_WORKERS];
	WorkerArg	wargs[AFF_MAX_WORKERS];
	int			started = 0;
	int			i;

	if (n <= 0)
		return AFF_OK;
	if (block < 1)
		block = 1;
	if (nthreads < 1)
		nthreads = 1;
	if (nthreads > AFF_MAX_WORKERS)
		nthreads = AFF_MAX_WORKERS;
	if ((n + block - 1) / block < nthreads)
		nthreads = (int) ((n + block - 1) / block);

	job.fn = fn;
	job.arg = arg;
	job.n = n;
	job.block = block;
	atomic_init(&job.next, 0);
	atomic_init(&job.stop, 0);

	if (nthreads > 1)
	{
		sigset_t	all;
		sigset_t	old;

		sigfillset(&all);
		pthread_sigmask(SIG_BLOCK, &all, &old);
		for (i = 1; i < nthreads; i++)
		{
			wargs[started].job = &job;
			wargs[started].thread_no = i;
			if (pthread_create(&tids[started], NULL, worker_main, &wargs[started]) != 0)
				break;
			started++;
		}
		pthread_sigmask(SIG_SETMASK, &old, NULL);
	}

	run_blocks(&job, 0, poll, poll_arg);

	for (i = 0; i < started; i++)
		pthread_join(tids[i], NULL);

	if (atomic_load(&job.stop))
		return aff_fail(err, AFF_ERR_CANCELLED, "the computation was cancelled");
	return AFF_OK;
}

/* Number of online CPUs, at least 1. */
int
aff_online_cpus(void)
{
	long		n = sysconf(_SC_NPROCESSORS_ONLN);

	return n < 1 ? 1 : (int) n;
}
