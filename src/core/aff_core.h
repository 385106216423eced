/*
 * aff_core.h
 *		Shared definitions of affinity's numerical engine.
 *
 * The engine under src/core/ is plain C11 and includes no PostgreSQL header.
 * It reports failures through AffStatus codes plus an AffError message
 * buffer, allocates only through the AffAllocator the caller hands it, and
 * runs its own worker threads.  The PostgreSQL binding (src/pg/) turns the
 * codes into ereport() calls and supplies an allocator backed by a memory
 * context, so the engine can be built, tested and fuzzed outside the server.
 */
#ifndef AFF_CORE_H
#define AFF_CORE_H

#include <stddef.h>
#include <stdint.h>

typedef enum AffStatus
{
	AFF_OK = 0,
	AFF_ERR_NOMEM,				/* the allocator returned NULL */
	AFF_ERR_CANCELLED,			/* the poll callback asked to stop */
	AFF_ERR_INVALID,			/* bad input values or options */
	AFF_ERR_CORRUPT,			/* model bytes fail validation */
	AFF_ERR_LIMIT,				/* a size limit of the format is exceeded */
	AFF_ERR_NUMERIC,			/* a solver met a non positive definite system */
	AFF_ERR_OPTION				/* an option's value cannot be used */
} AffStatus;

typedef struct AffError
{
	AffStatus	status;
	char		msg[256];
	char		detail[512];
	char		hint[256];
} AffError;

/*
 * Allocation interface.  alloc returns NULL on failure (never longjmps), and
 * is only ever called from the thread that called into the engine, outside
 * any parallel region.  Memory is returned uninitialised.
 */
typedef struct AffAllocator
{
	void	   *(*alloc) (void *ctx, size_t size);
	void		(*release) (void *ctx, void *ptr);
	void	   *ctx;
} AffAllocator;

/*
 * Poll callback, called by the calling thread between blocks of work while
 * workers run.  It must not longjmp; a nonzero result asks the engine to
 * stop, join its workers and return AFF_ERR_CANCELLED.
 */
typedef int (*AffPollFn) (void *arg);

extern AffStatus aff_fail(AffError *err, AffStatus status, const char *fmt,...)
			__attribute__((format(printf, 3, 4)));
extern AffStatus aff_detail(AffError *err, const char *fmt,...)
			__attribute__((format(printf, 2, 3)));
extern AffStatus aff_hint(AffError *err, const char *fmt,...)
			__attribute__((format(printf, 2, 3)));
extern double aff_clock(void);
extern void aff_assert_failed(const char *cond, const char *file, int line)
			__attribute__((noreturn));
extern void *aff_alloc(const AffAllocator *a, size_t size);
extern void *aff_alloc_array(const AffAllocator *a, size_t n, size_t elem);
extern void aff_release(const AffAllocator *a, void *ptr);
extern int	aff_mul_overflows(size_t a, size_t b, size_t *result);

/*
 * AFF_ASSERT(cond): a stated precondition or invariant of an engine
 * function.  Checked only in builds with -DAFF_ASSERTS (the engine test
 * program and the fuzzer), where a failure prints the condition, file and
 * line and aborts; otherwise it compiles to nothing.
 */
#ifdef AFF_ASSERTS
#define AFF_ASSERT(cond) \
	((cond) ? (void) 0 : aff_assert_failed(#cond, __FILE__, __LINE__))
#else
#define AFF_ASSERT(cond) ((void) 0)
#endif

/* Method and option codes stored in the model header. */
#define AFF_METHOD_IMPLICIT_ALS	1
#define AFF_METHOD_POPULARITY	2
#define AFF_METHOD_EASE			3
#define AFF_METHOD_ITEM_KNN		4
#define AFF_METHOD_ITEM_PROFILES	5	/* item content, no users (profiles.h) */
#define AFF_METHOD_CONTENT		6	/* content-based filtering over item profiles */
#define AFF_METHOD_SEQUENTIAL_RULES	7	/* rules over ordered events, no users (sequences.h) */

#define AFF_SOLVER_CG			1
#define AFF_SOLVER_CHOLESKY		2

#define AFF_CONFIDENCE_LINEAR	1
#define AFF_CONFIDENCE_LOG		2

/*
 * Key types, per side (user keys, item keys).  1 and 2 are the one-type
 * models of 1.1 and 1.2; the mixed pairs came with 1.3.
 */
#define AFF_KEYS_BIGINT			1	/* bigint users, bigint items */
#define AFF_KEYS_TEXT			2	/* text users, text items */
#define AFF_KEYS_BIGINT_TEXT	3	/* bigint users, text items */
#define AFF_KEYS_TEXT_BIGINT	4	/* text users, bigint items */

/* Whether key_type is one of the codes above. */
static inline int
aff_keys_valid(int key_type)
{
	return key_type >= AFF_KEYS_BIGINT && key_type <= AFF_KEYS_TEXT_BIGINT;
}

/* Whether the user side (users != 0) or the item side of key_type is text. */
static inline int
aff_keys_side_text(int key_type, int users)
{
	return users ? (key_type == AFF_KEYS_TEXT || key_type == AFF_KEYS_TEXT_BIGINT)
		: (key_type == AFF_KEYS_TEXT || key_type == AFF_KEYS_BIGINT_TEXT);
}

/* The key type of a model with these sides. */
static inline int
aff_keys_code(int user_text, int item_text)
{
	return user_text ? (item_text ? AFF_KEYS_TEXT : AFF_KEYS_TEXT_BIGINT)
		: (item_text ? AFF_KEYS_BIGINT_TEXT : AFF_KEYS_BIGINT);
}

/*
 * The name of a key type: "bigint" or "text" for one type on both sides,
 * "bigint,text" or "text,bigint" (user type first) for the mixed pairs.
 */
static inline const char *
aff_keys_name(int key_type)
{
	switch (key_type)
	{
		case AFF_KEYS_BIGINT:
			return "bigint";
		case AFF_KEYS_TEXT:
			return "text";
		case AFF_KEYS_BIGINT_TEXT:
			return "bigint,text";
		case AFF_KEYS_TEXT_BIGINT:
			return "text,bigint";
	}
	return "unknown";
}

/* Largest factor count the engine accepts (keeps per-row scratch small). */
#define AFF_MAX_FACTORS			1024

/* Users and items are indexed with int32 in the sparse structures. */
#define AFF_MAX_ENTITIES		((int64_t) 0x7fffffff)

#endif							/* AFF_CORE_H */
