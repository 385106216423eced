/*
 * parallel.h
 *		A small block-parallel loop over worker threads.
 */
#ifndef AFF_PARALLEL_H
#define AFF_PARALLEL_H

#include "aff_core.h"

/*
 * Work function: process rows [begin, end) as thread number thread_no
 * (0 is the calling thread).  Runs concurrently on several threads, so it
 * may only touch plain memory prepared beforehand; it must not allocate.
 * block_no numbers the block, so results that must be combined in a fixed
 * order (sums) can be stored per block.
 */
typedef void (*AffRangeFn) (void *arg, int thread_no, int64_t block_no,
							int64_t begin, int64_t end);

extern AffStatus aff_parallel_for(int nthreads, int64_t n, int64_t block,
								  AffRangeFn fn, void *arg,
								  AffPollFn poll, void *poll_arg,
								  AffError *err);
extern int	aff_online_cpus(void);

#endif
