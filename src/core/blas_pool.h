/*
 * blas_pool.h
 *		OpenBLAS's own thread pool: started with every signal blocked, and
 *		the limit on threads that call BLAS at the same time.
 */
#ifndef AFF_BLAS_POOL_H
#define AFF_BLAS_POOL_H

#include "aff_core.h"

/*
 * Make sure OpenBLAS's pool can serve `threads` threads (capped at its
 * build limit) and that every pool thread was created with all signals
 * blocked, so that no signal meant for the calling process runs a handler
 * on one of them.  The first call in a process replaces the pool the
 * library started when it was loaded (those threads kept the loader's
 * mask).  Leaves OpenBLAS single-threaded.  Call only from the thread that
 * owns the process's signal handling, while no BLAS call runs.
 */
extern void aff_blas_pool_prepare(int threads);

/* OpenBLAS's build limit NUM_THREADS (MAX_THREADS in its config string). */
extern int	aff_blas_build_threads(void);

/*
 * How many threads may call single-threaded BLAS at the same time without
 * leaving OpenBLAS's static table of work buffers (2 x NUM_THREADS slots).
 */
extern int	aff_blas_max_callers(void);

#endif							/* AFF_BLAS_POOL_H */
