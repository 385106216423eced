/*
 * util.c
 *		Error buffer, allocation and overflow helpers of the engine.
 */
#include "aff_core.h"

#include <stdarg.h>
#include <stdio.h>
#include <string.h>

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
