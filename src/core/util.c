/*
 * util.c
 *		Error buffer, allocation and overflow helpers of the engine.
 */
#include "aff_core.h"

#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

/*
 * Record a failure: status and message.  Returns the status so callers can
 * write "return aff_fail(...)".  The detail is cleared; add one with
 * aff_detail afterwards.
 */
AffStatus
aff_fail(AffError *err, AffStatus status, const char *fmt,...)
{
	va_list		ap;

	if (err == NULL)
		return status;
	err->status = status;
	va_start(ap, fmt);
	vsnprintf(err->msg, sizeof(err->msg), fmt, ap);
	va_end(ap);
	err->detail[0] = '\0';
	err->hint[0] = '\0';
	return status;
}

/* Attach a detail sentence to the failure already recorded in err. */
AffStatus
aff_detail(AffError *err, const char *fmt,...)
{
	va_list		ap;

	if (err == NULL)
		return AFF_OK;
	va_start(ap, fmt);
	vsnprintf(err->detail, sizeof(err->detail), fmt, ap);
	va_end(ap);
	return err->status;
}

/* Attach a hint (what to do about it) to the failure recorded in err. */
AffStatus
aff_hint(AffError *err, const char *fmt,...)
{
	va_list		ap;

	if (err == NULL)
		return AFF_OK;
	va_start(ap, fmt);
	vsnprintf(err->hint, sizeof(err->hint), fmt, ap);
	va_end(ap);
	return err->status;
}

/* Seconds on a monotonic clock, for timings (differences only). */
double
aff_clock(void)
{
	struct timespec ts;

	clock_gettime(CLOCK_MONOTONIC, &ts);
	return (double) ts.tv_sec + (double) ts.tv_nsec * 1e-9;
}

/* AFF_ASSERT's failure path: say what failed, where, and stop. */
void
aff_assert_failed(const char *cond, const char *file, int line)
{
	fprintf(stderr, "affinity engine assertion failed: %s (%s:%d)\n", cond, file, line);
	fflush(stderr);
	abort();
}

/* Returns 1 and leaves *result alone when a * b overflows size_t. */
int
aff_mul_overflows(size_t a, size_t b, size_t *result)
{
	if (a != 0 && b > SIZE_MAX / a)
		return 1;
	*result = a * b;
	return 0;
}

void *
aff_alloc(const AffAllocator *a, size_t size)
{
	return a->alloc(a->ctx, size == 0 ? 1 : size);
}

/* Allocate n elements of elem bytes, NULL on overflow or failure. */
void *
aff_alloc_array(const AffAllocator *a, size_t n, size_t elem)
{
	size_t		bytes;

	if (aff_mul_overflows(n, elem, &bytes))
		return NULL;
	return aff_alloc(a, bytes);
}

void
aff_release(const AffAllocator *a, void *ptr)
{
	if (ptr != NULL)
		a->release(a->ctx, ptr);
}
